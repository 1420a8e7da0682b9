//! Request limits, defined once. Each is a `befit serve` flag; the defaults
//! suit one trainer node sending a few thousand captions per step. The HTTP
//! routes, the caption bank and the offline commands all check against these.

use std::time::Duration;

use super::decode_budget::DEFAULT_DECODE_BUDGET_BYTES;
use super::image_decode::{ImageLimits, DEFAULT_MAX_DECODED_BYTES, DEFAULT_MAX_PIXELS};
use super::validation::{Invalid, Problem};

/// 32 MiB: room for a few hundred base64 images or tens of thousands of captions
/// (a 640x480 probe JPEG is about 65 KB, 87 KB in base64: about 380 of them;
/// a blocks caption is under 100 bytes).
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
/// Time for a whole body to arrive: a 32 MiB body needs about 1 MiB/s.
pub const DEFAULT_BODY_TIMEOUT_SECS: u64 = 30;
/// Slowest body accepted after [`BODY_RATE_GRACE`]: 4 KiB a second, far
/// below any real network, far above a client trickling bytes to hold a connection.
pub const DEFAULT_MIN_BODY_RATE: u64 = 4096;
/// Encoder work already queued beyond which new work requests are refused
/// before their body is read (503 with `Retry-After` = the queue's drain
/// time). Chosen by `make soak`'s 3x load (blocks-v1, 2 cores, two runs each,
/// BENCHMARKS.md "Under abuse and faults"): at 100 ms successful throughput
/// stayed at 0.89 and 0.92 of capacity with p99 0.47 to 0.54 s; at 250 ms
/// 0.89 and 0.89, p99 0.70 to 0.92 s; at 1000 ms 0.78 and 0.75, p99 1.8 to
/// 1.9 s (the queue drains past the overload into the next requests); a 503
/// took about 1 ms at all three. 250 ms rather than 100: as good at 3x on the
/// toy, and a larger encoder (a ViT-B/32-size model encodes about 230
/// captions a second here) queues more than 100 ms for a single reward
/// request, which would then refuse every concurrent one.
pub const DEFAULT_MAX_QUEUE_WAIT_MS: u64 = 250;
/// The first seconds of a body are not rate-checked (slow starts, small bodies).
pub const BODY_RATE_GRACE: Duration = Duration::from_secs(3);

/// One limit: what it counts and the flag that raises it, so every refusal says both.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Limit {
    BodyBytes,
    Groups,
    Captions,
    CaptionBytes,
    Images,
    Pixels,
    DecodedBytes,
    ProbeRows,
}

impl Limit {
    /// What the limit counts, for messages.
    pub fn what(self) -> &'static str {
        match self {
            Limit::BodyBytes => "request body size in bytes",
            Limit::Groups => "number of groups",
            Limit::Captions => "number of captions",
            Limit::CaptionBytes => "caption length in bytes",
            Limit::Images => "number of images",
            Limit::Pixels => "image size in pixels",
            Limit::DecodedBytes => "decoded image size in bytes",
            Limit::ProbeRows => "number of probe rows",
        }
    }

    /// The `befit serve` flag that sets it.
    pub fn flag(self) -> &'static str {
        match self {
            Limit::BodyBytes => "--max-body-bytes",
            Limit::Groups => "--max-groups",
            Limit::Captions => "--max-captions",
            Limit::CaptionBytes => "--max-caption-bytes",
            Limit::Images => "--max-images",
            Limit::Pixels => "--max-pixels",
            Limit::DecodedBytes => "--max-decoded-bytes",
            Limit::ProbeRows => "--max-probe-rows",
        }
    }
}

/// The limits in force, as `GET /v1/limits` shows them (each named after its
/// `befit serve` flag; durations in the flag's unit).
#[derive(Debug, Clone, PartialEq, Eq, serde::Serialize, utoipa::ToSchema)]
pub struct Limits {
    pub max_body_bytes: usize,
    pub max_groups: usize,
    pub max_captions: usize,
    pub max_caption_bytes: usize,
    pub max_images: usize,
    pub max_pixels: u64,
    pub max_decoded_bytes: u64,
    /// Bytes of images being decoded at once, server-wide.
    pub decode_budget_bytes: u64,
    pub max_probe_rows: usize,
    pub max_inflight: usize,
    #[serde(rename = "request_timeout_secs", serialize_with = "seconds")]
    #[schema(value_type = f64)]
    pub request_timeout: Duration,
    /// Time for a whole body to arrive.
    #[serde(rename = "body_timeout_secs", serialize_with = "seconds")]
    #[schema(value_type = f64)]
    pub body_timeout: Duration,
    /// Bytes a second a body must keep up after [`BODY_RATE_GRACE`].
    pub min_body_rate: u64,
    /// Queued encoder work past which new work is refused before its body is read.
    #[serde(rename = "max_queue_wait_ms", serialize_with = "millis")]
    #[schema(value_type = u64)]
    pub max_queue_wait: Duration,
}

fn seconds<S: serde::Serializer>(d: &Duration, s: S) -> Result<S::Ok, S::Error> {
    s.serialize_f64(d.as_secs_f64())
}

fn millis<S: serde::Serializer>(d: &Duration, s: S) -> Result<S::Ok, S::Error> {
    s.serialize_u64(d.as_millis().try_into().unwrap_or(u64::MAX))
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
            max_decoded_bytes: DEFAULT_MAX_DECODED_BYTES,
            decode_budget_bytes: DEFAULT_DECODE_BUDGET_BYTES,
            max_probe_rows: DEFAULT_MAX_PROBE_ROWS,
            max_inflight: DEFAULT_MAX_INFLIGHT,
            request_timeout: Duration::from_secs(DEFAULT_REQUEST_TIMEOUT_SECS),
            body_timeout: Duration::from_secs(DEFAULT_BODY_TIMEOUT_SECS),
            min_body_rate: DEFAULT_MIN_BODY_RATE,
            max_queue_wait: Duration::from_millis(DEFAULT_MAX_QUEUE_WAIT_MS),
        }
    }
}

impl Limits {
    /// The value in force for `limit`.
    pub fn value(&self, limit: Limit) -> u64 {
        match limit {
            Limit::BodyBytes => self.max_body_bytes as u64,
            Limit::Groups => self.max_groups as u64,
            Limit::Captions => self.max_captions as u64,
            Limit::CaptionBytes => self.max_caption_bytes as u64,
            Limit::Images => self.max_images as u64,
            Limit::Pixels => self.max_pixels,
            Limit::DecodedBytes => self.max_decoded_bytes,
            Limit::ProbeRows => self.max_probe_rows as u64,
        }
    }

    /// The limits one image decode is held to.
    pub fn image(&self) -> ImageLimits {
        ImageLimits {
            max_pixels: self.max_pixels,
            max_decoded_bytes: self.max_decoded_bytes,
        }
    }

    /// Refuses `count` over `limit`, blaming `field`.
    pub fn check(&self, limit: Limit, count: usize, field: &str) -> Result<(), Invalid> {
        let value = self.value(limit);
        if count as u64 > value {
            return Err(Invalid::new(field, Problem::OverLimit { limit, value }));
        }
        Ok(())
    }

    /// One caption (sample, reference, bank entry or text): not blank, not too long.
    pub fn check_caption(&self, text: &str, field: &str) -> Result<(), Invalid> {
        if text.trim().is_empty() {
            return Err(Invalid::new(field, Problem::Blank("captions")));
        }
        self.check(Limit::CaptionBytes, text.len(), field)
    }

    /// A list of captions under `field` (`field[i]` blamed): at least one, at most the limit.
    pub fn check_captions<S: AsRef<str>>(&self, texts: &[S], field: &str) -> Result<(), Invalid> {
        if texts.is_empty() {
            return Err(Invalid::new(field, Problem::Missing("caption")));
        }
        self.check(Limit::Captions, texts.len(), field)?;
        for (i, text) in texts.iter().enumerate() {
            self.check_caption(text.as_ref(), &format!("{field}[{i}]"))?;
        }
        Ok(())
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn checks_blame_the_field_and_name_the_flag() {
        let limits = Limits {
            max_caption_bytes: 4,
            max_captions: 2,
            ..Limits::default()
        };
        assert!(limits.check_captions(&["abcd", "ab"], "captions").is_ok());
        let e = limits
            .check_captions(&["abcd", "abcde"], "captions")
            .unwrap_err();
        assert_eq!(e.field, "captions[1]");
        assert!(e.to_string().contains("--max-caption-bytes"), "{e}");
        let e = limits
            .check_captions(&["a", "b", "c"], "texts")
            .unwrap_err();
        assert_eq!(
            (e.field.as_str(), e.problem.is_over_limit()),
            ("texts", true)
        );
        let e = limits.check_captions(&["a", "  "], "captions").unwrap_err();
        assert_eq!(e.problem, Problem::Blank("captions"));
        let none: [&str; 0] = [];
        assert_eq!(
            limits
                .check_captions(&none, "captions")
                .unwrap_err()
                .problem,
            Problem::Missing("caption")
        );
    }
}
