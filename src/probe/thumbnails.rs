//! Thumbnails of the probe images a report shows as examples.

use std::collections::BTreeSet;
use std::io::Read as _;

use crate::intake::image_decode::ImageLimits;
use crate::intake::limits::DEFAULT_MAX_BODY_BYTES;
use crate::intake::thumbnail::thumbnail_data_uri;
use crate::probe::set::{ImageSource, ProbeSet};
use crate::stats::Thumbnails;

/// A thumbnail for each row of `set` whose line is in `lines` and whose
/// bytes `read` can give (a file, or bytes sent in the request; an image
/// named only by id has no bytes to show). An image that cannot be read or
/// decoded gets none: the report says "no preview" there and goes on.
pub fn thumbnails(
    set: &ProbeSet,
    lines: &BTreeSet<usize>,
    read: &dyn Fn(&ImageSource) -> Option<Vec<u8>>,
    limits: &ImageLimits,
) -> Thumbnails {
    set.rows
        .iter()
        .filter(|row| lines.contains(&row.line))
        .filter_map(|row| {
            let bytes = read(&row.image)?;
            let uri = thumbnail_data_uri(&bytes, limits).ok()?;
            Some((row.line, uri))
        })
        .collect()
}

/// The bytes of a probe image offline: a file (no larger than a request body
/// may be, as under a server's image root) or bytes already in memory.
pub fn read_offline(source: &ImageSource) -> Option<Vec<u8>> {
    match source {
        ImageSource::Path(path) => {
            let limit = DEFAULT_MAX_BODY_BYTES as u64;
            let file = std::fs::File::open(path).ok()?;
            let mut bytes = Vec::new();
            file.take(limit + 1).read_to_end(&mut bytes).ok()?;
            (bytes.len() as u64 <= limit).then_some(bytes)
        }
        ImageSource::Bytes(bytes) => Some(bytes.to_vec()),
        ImageSource::Id(_) => None,
    }
}
