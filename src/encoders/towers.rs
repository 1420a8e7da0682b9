//! ONNX Runtime sessions for the two encoders. `Session::run` takes `&mut
//! self`, so each worker thread owns its own session.

use std::borrow::Cow;
use std::path::Path;

use ort::environment::Environment;
use ort::session::builder::GraphOptimizationLevel;
use ort::session::{Session, SessionInputValue};
use ort::value::Tensor;

use crate::batching::BatchRunner;
use crate::bundle::Padding;
use crate::intake::captions::pad_batch;
use crate::vectors::normalise;

/// Opens a session on `graph` with `intra_threads` threads inside each operator.
pub fn open_session(
    env: &Environment,
    graph: &Path,
    intra_threads: usize,
) -> Result<Session, String> {
    let describe = |e: String| format!("{}: {e}", graph.display());
    Session::builder(env)
        .map_err(|e| describe(format!("{e:?}")))?
        .with_optimization_level(GraphOptimizationLevel::Level3)
        .map_err(|e| describe(format!("{e:?}")))?
        .with_intra_threads(intra_threads.max(1))
        .map_err(|e| describe(format!("{e:?}")))?
        .commit_from_file(graph)
        .map_err(|e| describe(format!("cannot load the ONNX graph: {e:?}")))
}

/// Runs `session` on named inputs; the shape and values of its float output `output`.
pub fn run_f32(
    session: &mut Session,
    inputs: Vec<(Cow<'_, str>, SessionInputValue<'_>)>,
    output: &str,
) -> Result<(Vec<i64>, Vec<f32>), String> {
    let outputs = session.run(inputs).map_err(|e| format!("{e:?}"))?;
    let value = outputs
        .get(output)
        .ok_or_else(|| format!("the graph produced no output named {output:?}"))?;
    let (shape, data) = value
        .try_extract_tensor::<f32>()
        .map_err(|e| format!("{e:?}"))?;
    Ok((shape.to_vec(), data.to_vec()))
}

/// Runs `session` on named inputs and returns the rows of the float output, unit length.
fn run_rows(
    session: &mut Session,
    inputs: Vec<(Cow<'_, str>, SessionInputValue<'_>)>,
    output: &str,
    rows: usize,
    dimension: usize,
) -> Result<Vec<Vec<f32>>, String> {
    let (dims, data) = run_f32(session, inputs, output)?;
    if dims != [rows as i64, dimension as i64] {
        return Err(format!(
            "output {output:?} has shape {dims:?}, expected [{rows}, {dimension}]"
        ));
    }
    Ok(data
        .chunks_exact(dimension)
        .map(|row| {
            let mut v = row.to_vec();
            normalise(&mut v);
            v
        })
        .collect())
}

/// The image encoder: preprocessed `[3, size, size]` tensors in, unit vectors out.
pub struct ImageTower {
    pub session: Session,
    pub input: String,
    pub output: String,
    pub size: usize,
    pub dimension: usize,
}

impl BatchRunner for ImageTower {
    type Item = Vec<f32>;
    type Output = Vec<f32>;

    fn run(&mut self, items: &[Vec<f32>]) -> Result<Vec<Vec<f32>>, String> {
        let per_image = 3 * self.size * self.size;
        let mut data = Vec::with_capacity(items.len() * per_image);
        for item in items {
            if item.len() != per_image {
                return Err(format!(
                    "image tensor has {} values, expected {per_image}",
                    item.len()
                ));
            }
            data.extend_from_slice(item);
        }
        let shape = [items.len(), 3, self.size, self.size];
        let tensor =
            Tensor::from_array((shape, data.into_boxed_slice())).map_err(|e| format!("{e:?}"))?;
        let inputs = vec![(
            Cow::from(self.input.as_str()),
            SessionInputValue::from(tensor),
        )];
        run_rows(
            &mut self.session,
            inputs,
            &self.output,
            items.len(),
            self.dimension,
        )
    }
}

/// The text encoder: unpadded token ids in, unit vectors out.
pub struct TextTower {
    pub session: Session,
    pub ids_input: String,
    pub mask_input: Option<String>,
    pub output: String,
    pub pad_id: u32,
    pub padding: Padding,
    pub max_tokens: usize,
    pub dimension: usize,
}

impl BatchRunner for TextTower {
    type Item = Vec<i64>;
    type Output = Vec<f32>;

    fn run(&mut self, items: &[Vec<i64>]) -> Result<Vec<Vec<f32>>, String> {
        let sequences: Vec<&[i64]> = items.iter().map(Vec::as_slice).collect();
        let (ids, mask) = pad_batch(&sequences, self.pad_id, self.padding, self.max_tokens);
        let ids = Tensor::from_array(ids).map_err(|e| format!("{e:?}"))?;
        let mut inputs = vec![(
            Cow::from(self.ids_input.as_str()),
            SessionInputValue::from(ids),
        )];
        if let Some(mask_name) = &self.mask_input {
            let mask = Tensor::from_array(mask).map_err(|e| format!("{e:?}"))?;
            inputs.push((Cow::from(mask_name.as_str()), SessionInputValue::from(mask)));
        }
        run_rows(
            &mut self.session,
            inputs,
            &self.output,
            items.len(),
            self.dimension,
        )
    }
}
