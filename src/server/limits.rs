//! Request limits of the HTTP API. Each is a `befit serve` flag; the defaults
//! suit one trainer node sending a few thousand captions per step.

use std::time::Duration;

use crate::intake::image_decode::DEFAULT_MAX_PIXELS;

/// 32 MiB: room for a few hundred base64 images or tens of thousands of captions.
pub const DEFAULT_MAX_BODY_BYTES: usize = 32 * 1024 * 1024;
/// Groups (images) in one rewards request.
pub const DEFAULT_MAX_GROUPS: usize = 1024;
/// Captions of all kinds in one request: samples, references and greedy ones.
pub const DEFAULT_MAX_CAPTIONS: usize = 16_384;
/// Bytes of one caption; far past any token limit, so only abuse is refused.
pub const DEFAULT_MAX_CAPTION_BYTES: usize = 2048;
/// Images in one registration or vectors request.
pub const DEFAULT_MAX_IMAGES: usize = 256;
/// Rows of a probe set sent to the statistics routes (the bundled probe set has 1,000).
pub const DEFAULT_MAX_PROBE_ROWS: usize = 20_000;
/// Requests served at once before new ones get 503.
pub const DEFAULT_MAX_INFLIGHT: usize = 512;
/// Wall-clock bound of one request.
pub const DEFAULT_REQUEST_TIMEOUT_SECS: u64 = 120;

/// The limits in force.
#[derive(Debug, Clone)]
pub struct Limits {
    pub max_body_bytes: usize,
    pub max_groups: usize,
    pub max_captions: usize,
    pub max_caption_bytes: usize,
    pub max_images: usize,
    pub max_pixels: u64,
    pub max_probe_rows: usize,
    pub max_inflight: usize,
    pub request_timeout: Duration,
}

impl Default for Limits {
    fn default() -> Self {
        Limits {
            max_body_bytes: DEFAULT_MAX_BODY_BYTES,
            max_groups: DEFAULT_MAX_GROUPS,
            max_captions: DEFAULT_MAX_CAPTIONS,
            max_caption_bytes: DEFAULT_MAX_CAPTION_BYTES,
            max_images: DEFAULT_MAX_IMAGES,
            max_pixels: DEFAULT_MAX_PIXELS,
            max_probe_rows: DEFAULT_MAX_PROBE_ROWS,
            max_inflight: DEFAULT_MAX_INFLIGHT,
            request_timeout: Duration::from_secs(DEFAULT_REQUEST_TIMEOUT_SECS),
        }
    }
}
