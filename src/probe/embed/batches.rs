//! Encoder calls in batches: a batch that fails is retried item by item to
//! find the rows at fault, and every returned row is checked to be usable.

use ndarray::Array2;

use crate::probe::cancel::Cancel;
use crate::probe::ProbeError;
use crate::vectors::EmbedError;

/// Which tower, for messages.
#[derive(Clone, Copy)]
pub(super) enum Tower {
    Image,
    Text,
}

impl Tower {
    pub(super) fn name(self) -> &'static str {
        match self {
            Tower::Image => "image",
            Tower::Text => "text",
        }
    }
}

/// One encoder call on a batch of items.
pub(super) type EncodeBatch<'a, T> = dyn Fn(&[T]) -> Result<Array2<f32>, EmbedError> + 'a;

/// Per item: its vector, or why the encoder failed on it alone.
pub(super) type ItemVectors = Vec<Result<Vec<f32>, String>>;

/// How one tower's items are embedded.
pub(super) struct Batches<'a> {
    pub tower: Tower,
    /// Items per encoder call.
    pub batch: usize,
    /// Length of every vector.
    pub dimension: usize,
    /// Checked before every call.
    pub cancel: &'a Cancel,
}

/// Embeds `items` in batches; per item, its vector or why the encoder failed
/// on it alone. `done(n)` is told after every batch.
pub(super) fn embed_in_batches<T>(
    how: &Batches<'_>,
    items: &[T],
    lines: &[usize],
    embed: &EncodeBatch<'_, T>,
    done: &mut dyn FnMut(usize),
) -> Result<ItemVectors, ProbeError> {
    let Batches {
        tower,
        batch,
        dimension,
        cancel,
    } = *how;
    let mut out = Vec::with_capacity(items.len());
    for (chunk_index, chunk) in items.chunks(batch).enumerate() {
        if cancel.is_cancelled() {
            return Err(ProbeError::Cancelled);
        }
        let start = chunk_index * batch;
        match embed(chunk) {
            Ok(m) => out.extend(rows_of(tower, &m, chunk.len(), dimension)?),
            Err(batch_error) => {
                // Find the culprits: every item alone.
                let mut singles = Vec::with_capacity(chunk.len());
                let mut encoder_faults = 0;
                for one in chunk.chunks(1) {
                    singles.push(match embed(one) {
                        Ok(m) => rows_of(tower, &m, 1, dimension)?.remove(0),
                        Err(e) => {
                            encoder_faults += usize::from(!e.input);
                            Err(e.message)
                        }
                    });
                }
                // Every item failing alone blames the encoder, unless each
                // failure is its own input's (a missing image): those are bad rows.
                if chunk.len() > 1 && encoder_faults == chunk.len() {
                    return Err(ProbeError::Encoder {
                        tower: tower.name(),
                        first_line: lines[start],
                        last_line: lines[start + chunk.len() - 1],
                        message: batch_error.message,
                    });
                }
                out.extend(singles);
            }
        }
        done(chunk.len());
    }
    Ok(out)
}

/// The rows of an encoder's answer, each checked to be usable.
fn rows_of(
    tower: Tower,
    m: &Array2<f32>,
    want_rows: usize,
    dimension: usize,
) -> Result<ItemVectors, ProbeError> {
    if m.dim() != (want_rows, dimension) {
        return Err(ProbeError::Shape {
            tower: tower.name(),
            got: m.dim(),
            want_rows,
            want_dimension: dimension,
        });
    }
    Ok(m.outer_iter()
        .map(|row| {
            let norm: f32 = row.iter().map(|x| x * x).sum::<f32>().sqrt();
            if norm.is_finite() && norm > 0.0 {
                Ok(row.to_vec())
            } else {
                Err("the encoder returned a zero or non-finite vector".to_string())
            }
        })
        .collect())
}
