//! What the bank accepts as a caption and as a tag. Each fault is a variant
//! of [`EntryProblem`], so callers (the HTTP layer, the import's bad-line
//! report) act on the kind of fault, never on a message.

/// Longest tag accepted, in bytes: a tag names a data set or a split, not a
/// sentence, and every tag is kept in memory with its caption ids.
pub const MAX_TAG_BYTES: usize = 128;

/// What is wrong with a caption or a tag given to the bank.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
pub enum EntryProblem {
    /// Nothing but white space.
    #[error("the caption is empty; send some text")]
    EmptyCaption,
    /// Over the bank's caption limit.
    #[error("the caption is {bytes} bytes, the limit is {max}; shorten it")]
    CaptionTooLong {
        /// Length given, in bytes.
        bytes: usize,
        /// The limit, in bytes.
        max: usize,
    },
    /// A NUL character in the caption.
    #[error("the caption contains a NUL character; remove it")]
    NulInCaption,
    /// An empty tag.
    #[error("the tag is empty; leave it out instead")]
    EmptyTag,
    /// Over [`MAX_TAG_BYTES`].
    #[error("the tag is {bytes} bytes, the limit is {max}")]
    TagTooLong {
        /// Length given, in bytes.
        bytes: usize,
        /// The limit, in bytes.
        max: usize,
    },
    /// A control character in the tag.
    #[error("the tag contains a control character; use printable text")]
    ControlInTag,
}

impl EntryProblem {
    /// True when the tag, not the caption's text, is at fault.
    pub fn is_tag(&self) -> bool {
        matches!(
            self,
            EntryProblem::EmptyTag | EntryProblem::TagTooLong { .. } | EntryProblem::ControlInTag
        )
    }
}

/// Checks a caption: not blank, at most `max_bytes` bytes of UTF-8 (the
/// bank's [`super::BankConfig::max_caption_bytes`], the service's
/// `--max-caption-bytes`), no NUL character.
pub fn check_caption(text: &str, max_bytes: usize) -> Result<(), EntryProblem> {
    if text.trim().is_empty() {
        Err(EntryProblem::EmptyCaption)
    } else if text.len() > max_bytes {
        Err(EntryProblem::CaptionTooLong {
            bytes: text.len(),
            max: max_bytes,
        })
    } else if text.contains('\0') {
        Err(EntryProblem::NulInCaption)
    } else {
        Ok(())
    }
}

/// Checks a tag: 1 to [`MAX_TAG_BYTES`] bytes, no control characters.
pub fn check_tag(tag: &str) -> Result<(), EntryProblem> {
    if tag.is_empty() {
        Err(EntryProblem::EmptyTag)
    } else if tag.len() > MAX_TAG_BYTES {
        Err(EntryProblem::TagTooLong {
            bytes: tag.len(),
            max: MAX_TAG_BYTES,
        })
    } else if tag.chars().any(char::is_control) {
        Err(EntryProblem::ControlInTag)
    } else {
        Ok(())
    }
}
