//! The export read by the reference cross-check (`tests/reference/test_stats.py`):
//! one JSON file holding the vectors and labels a report was computed from,
//! the options, and the report itself, so numpy and scipy can recompute
//! every figure from exactly the numbers befit used.

use std::path::Path;

use serde::{Deserialize, Serialize};

use super::calibration::{calibrate, CalibrationOptions, CalibrationReport};
use super::drift::{drift, DriftOptions, DriftReport};
use super::pairs::ProbeVectors;
use super::StatsError;

/// Value of every export's `format` field.
pub const EXPORT_FORMAT: &str = "befit-stats-export";

/// Version of the export layout; raised when a field changes meaning.
pub const EXPORT_VERSION: u32 = 1;

/// A calibration with what it was computed from.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct CalibrationExport {
    /// Always [`EXPORT_FORMAT`].
    pub format: String,
    /// [`EXPORT_VERSION`] of the writer.
    pub version: u32,
    /// Always `"calibration"`.
    pub kind: String,
    /// Options the report was computed with.
    pub options: CalibrationOptions,
    /// The vectors (f64, L2-normalised) and labels.
    pub vectors: ProbeVectors,
    /// The report.
    pub report: CalibrationReport,
}

/// A drift comparison with what it was computed from.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct DriftExport {
    /// Always [`EXPORT_FORMAT`].
    pub format: String,
    /// [`EXPORT_VERSION`] of the writer.
    pub version: u32,
    /// Always `"drift"`.
    pub kind: String,
    /// Options the report was computed with.
    pub options: DriftOptions,
    /// The old bundle's vectors.
    pub from: ProbeVectors,
    /// The new bundle's vectors.
    pub to: ProbeVectors,
    /// The report.
    pub report: DriftReport,
}

/// Calibrates `vectors` and bundles the report with its inputs.
pub fn calibration_export(
    vectors: &ProbeVectors,
    options: &CalibrationOptions,
) -> Result<CalibrationExport, StatsError> {
    Ok(CalibrationExport {
        format: EXPORT_FORMAT.into(),
        version: EXPORT_VERSION,
        kind: "calibration".into(),
        options: options.clone(),
        vectors: vectors.clone(),
        report: calibrate(vectors, options)?,
    })
}

/// Compares `from` with `to` and bundles the report with its inputs.
pub fn drift_export(
    from: &ProbeVectors,
    to: &ProbeVectors,
    options: &DriftOptions,
) -> Result<DriftExport, StatsError> {
    Ok(DriftExport {
        format: EXPORT_FORMAT.into(),
        version: EXPORT_VERSION,
        kind: "drift".into(),
        options: options.clone(),
        from: from.clone(),
        to: to.clone(),
        report: drift(from, to, options)?,
    })
}

/// Writes any export (or report) to `path` as JSON, creating the folder.
pub fn write_json<T: Serialize>(path: &Path, value: &T) -> Result<(), StatsError> {
    let io = |source| StatsError::Write {
        path: path.to_path_buf(),
        source,
    };
    if let Some(dir) = path.parent().filter(|d| !d.as_os_str().is_empty()) {
        std::fs::create_dir_all(dir).map_err(io)?;
    }
    let file = std::fs::File::create(path).map_err(io)?;
    let mut out = std::io::BufWriter::new(file);
    serde_json::to_writer(&mut out, value).map_err(|e| io(e.into()))?;
    std::io::Write::flush(&mut out).map_err(io)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::stats::pairs::tests::from_similarity;
    use ndarray::array;

    #[test]
    fn export_round_trips_and_names_its_format() {
        let v = from_similarity(&array![[0.8, 0.1], [0.2, 0.7]], vec![0, 1]);
        let export = calibration_export(&v, &CalibrationOptions::default()).unwrap();
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("sub/calibration.json");
        write_json(&path, &export).unwrap();
        let text = std::fs::read_to_string(&path).unwrap();
        let back: CalibrationExport = serde_json::from_str(&text).unwrap();
        assert_eq!(back.format, EXPORT_FORMAT);
        assert_eq!(back.kind, "calibration");
        // serde_json's default float parsing may be one ulp off, so compare
        // what is exact: shapes, counts and labels.
        assert_eq!(back.report.counts, export.report.counts);
        assert_eq!(back.vectors.images.dim(), (2, 3));
        assert_eq!(back.vectors.caption_texts, v.caption_texts);
    }
}
