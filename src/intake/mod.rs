//! Request bytes to encoder inputs.
//!
//! - [`image_decode`]: PNG/JPEG/WebP bytes to upright RGB pixels, refusing
//!   oversized images from their header before decoding.
//! - [`decode_budget`]: the server-wide memory budget for decodes in flight.
//! - [`resample`]: Pillow-compatible resampling, so preprocessing matches the
//!   Python side that trained and exported the encoders.
//! - [`thumbnail`]: small JPEG previews as `data:` URIs, for the reports.
//! - [`image_tensor`]: the bundle's resize rule and normalisation, to NCHW floats.
//! - [`captions`]: tokenisation with prefix, truncation (reported) and padding.
//! - [`image_root`]: image paths relative to a root folder, never escaping it.
//! - [`image_source`]: how requests, probe rows and commands name an image.
//! - [`limits`]: the request limits, each with its flag, defined once.
//! - [`validation`]: typed faults of a request's fields.

pub mod captions;
pub mod decode_budget;
pub mod image_decode;
pub mod image_root;
pub mod image_source;
pub mod image_tensor;
pub mod limits;
pub mod resample;
pub mod thumbnail;
pub mod validation;
