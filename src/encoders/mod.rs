//! The encoders and the engine around them.
//!
//! - [`towers`]: one ONNX Runtime session per worker thread for the image and
//!   the text encoder, as [`crate::batching::BatchRunner`]s.
//! - [`fluency`]: a bundle's optional fluency head, one session behind a mutex.
//! - [`model`]: one loaded bundle: its checked graphs, tokenizer, batchers and
//!   caption cache; turns captions and image tensors into unit vectors.
//! - [`engine`]: every loaded model plus the image store and image root; turns
//!   an image reference (id, bytes or path) into a content id and a vector.
//! - [`loading`]: opening and loading the bundles a process works with.
//! - [`offline`]: the [`crate::vectors::Embedder`] the CLI's offline work uses.

pub mod engine;
pub mod fluency;
pub mod loading;
pub mod model;
pub mod offline;
pub mod towers;

pub use engine::{Engine, EngineError, ImageSource, Registered};
pub use loading::{load_bundles, LoadBundlesError};
pub use model::{
    CaptionVector, EncodeError, LoadError, Model, ModelSettings, ThreadLayout, LARGE_GRAPH_BYTES,
};
