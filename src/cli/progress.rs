//! The progress bar `befit bank import` draws: bytes of the file read, with
//! captions per second and time left. The bank only reports where an import
//! is ([`crate::bank::progress`]); drawing is the command line's business.

use indicatif::{ProgressBar, ProgressStyle};

use crate::bank::progress::ImportProgress;
use crate::bank::ImportReport;

/// How often the bar redraws at most, per second.
const REDRAWS_PER_SECOND: u8 = 8;

/// A bar over the bytes of the file being imported.
pub struct ImportBar {
    bar: ProgressBar,
}

impl ImportBar {
    /// A bar for a file of `total_bytes` bytes, drawn on standard error.
    pub fn new(total_bytes: u64) -> Self {
        let bar = ProgressBar::with_draw_target(
            Some(total_bytes),
            indicatif::ProgressDrawTarget::stderr_with_hz(REDRAWS_PER_SECOND),
        );
        let style = ProgressStyle::with_template(
            "{wide_bar} {percent:>3}% {msg} [{elapsed_precise}, {eta_precise} left]",
        )
        .unwrap_or_else(|_| ProgressStyle::default_bar());
        bar.set_style(style);
        Self { bar }
    }

    /// Moves the bar to where the import is.
    pub fn update(&self, p: &ImportProgress) {
        self.bar.set_position(p.bytes_read);
        let secs = self.bar.elapsed().as_secs_f64().max(1e-3);
        self.bar.set_message(format!(
            "{} added, {} present, {} bad, {:.0} captions/s",
            p.added,
            p.present,
            p.bad,
            (p.added + p.present) as f64 / secs
        ));
    }

    /// Leaves the bar at its end with a summary.
    pub fn finish(&self, report: &ImportReport) {
        self.bar.finish_with_message(format!(
            "{} added, {} present, {} bad lines",
            report.added, report.present, report.bad
        ));
    }
}
