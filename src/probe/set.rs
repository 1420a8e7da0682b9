//! A probe set in memory: rows of one image, its true captions and optional
//! contrasts, each remembering the line it came from.

pub use crate::intake::image_source::ImageSource;

/// A true caption with one fact changed.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Contrast {
    /// The altered caption.
    pub caption: String,
    /// What was changed: a free label such as `colour`, `shape`, `size`,
    /// `relation`, `count`; figures are reported per label.
    pub changed: String,
    /// Index into the row's `captions` of the caption it alters.
    pub from: usize,
}

/// One row: an image with its captions.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct ProbeRow {
    /// 1-based line in the probe file (or position in the request).
    pub line: usize,
    /// The image.
    pub image: ImageSource,
    /// The image as written in the probe set (path relative to the file, or
    /// id); reports name images by it, so they do not depend on where the
    /// probe set lives.
    pub image_name: String,
    /// True captions, at least one, none empty.
    pub captions: Vec<String>,
    /// Contrast captions, possibly none.
    pub contrasts: Vec<Contrast>,
}

/// A validated probe set.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct ProbeSet {
    /// Where the rows came from (a file path, or a name such as `request`),
    /// for messages.
    pub source: String,
    /// The rows, in file order.
    pub rows: Vec<ProbeRow>,
}

impl ProbeSet {
    /// Number of true captions over all rows.
    pub fn caption_count(&self) -> usize {
        self.rows.iter().map(|r| r.captions.len()).sum()
    }

    /// Number of contrast captions over all rows.
    pub fn contrast_count(&self) -> usize {
        self.rows.iter().map(|r| r.contrasts.len()).sum()
    }
}
