//! A bundle's fluency head (`[fluency]` of `bundle.toml`) as one ONNX Runtime
//! session: the token ids the text tower gets in, padded the same way, the
//! probability that each caption is well-formed out. The head is a few
//! hundred kilobytes and runs once per guarded request, so one session
//! behind a mutex serves the whole process; callers run it off the async
//! runtime.

use std::borrow::Cow;
use std::sync::{Mutex, PoisonError};

use ort::environment::Environment;
use ort::session::{Session, SessionInputValue};
use ort::value::Tensor;

use super::model::LoadError;
use super::towers::{open_session, run_f32};
use crate::bundle::graph_check::check_fluency_graph;
use crate::bundle::{Bundle, FluencySpec, Padding};
use crate::intake::captions::pad_batch;
use crate::scoring::FluencyHead;

/// Captions per run of the head: a request's captions go in runs of at most
/// this many, so one very large request cannot allocate one huge tensor.
pub const FLUENCY_BATCH: usize = 256;

/// The fluency head of one loaded bundle.
#[derive(Debug)]
pub struct FluencySession {
    session: Mutex<Session>,
    spec: FluencySpec,
    pad_id: u32,
    padding: Padding,
    max_tokens: usize,
}

impl FluencySession {
    /// Opens `[fluency]`'s graph of `bundle` and checks it against the manifest.
    pub fn open(
        env: &Environment,
        bundle: &Bundle,
        spec: &FluencySpec,
        intra_threads: usize,
    ) -> Result<FluencySession, LoadError> {
        let graph = bundle.dir.join(&spec.file);
        let session = open_session(env, &graph, intra_threads).map_err(LoadError::Session)?;
        check_fluency_graph(&bundle.dir.join("bundle.toml"), &graph, &session, spec)?;
        let text = &bundle.manifest.text;
        Ok(FluencySession {
            session: Mutex::new(session),
            spec: spec.clone(),
            pad_id: text.pad_id,
            padding: text.padding,
            max_tokens: text.max_tokens,
        })
    }

    fn run(&self, ids: &[&[i64]]) -> Result<Vec<f32>, String> {
        let (padded, mask) = pad_batch(ids, self.pad_id, self.padding, self.max_tokens);
        let padded = Tensor::from_array(padded).map_err(|e| format!("{e:?}"))?;
        let mut inputs = vec![(
            Cow::from(self.spec.ids_input.as_str()),
            SessionInputValue::from(padded),
        )];
        if let Some(name) = &self.spec.mask_input {
            let mask = Tensor::from_array(mask).map_err(|e| format!("{e:?}"))?;
            inputs.push((Cow::from(name.as_str()), SessionInputValue::from(mask)));
        }
        // The session keeps no state between runs, so a run that panicked
        // while holding the lock leaves it usable.
        let mut session = self.session.lock().unwrap_or_else(PoisonError::into_inner);
        let output = &self.spec.output;
        let (dims, data) = run_f32(&mut session, inputs, output)?;
        if dims != [ids.len() as i64] {
            return Err(format!(
                "output {output:?} has shape {dims:?}, expected [{}]",
                ids.len()
            ));
        }
        match data.iter().find(|p| !(0.0..=1.0).contains(*p)) {
            Some(p) => Err(format!(
                "output {output:?} gave {p}, not a probability from 0 to 1"
            )),
            None => Ok(data),
        }
    }
}

impl FluencyHead for FluencySession {
    fn probabilities(&self, ids: &[&[i64]]) -> Result<Vec<f32>, String> {
        let mut out = Vec::with_capacity(ids.len());
        for chunk in ids.chunks(FLUENCY_BATCH) {
            out.extend(self.run(chunk)?);
        }
        Ok(out)
    }
}
