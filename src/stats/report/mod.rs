//! Calibration and drift reports as single self-contained HTML files: inline
//! CSS and SVG, no scripts, no external fonts or styles, every caption and
//! name escaped. Tables carry the numbers, plots the shapes.
//!
//! - `page`: the frame, style sheet, tables, number formatting, escaping.
//! - `calibration`: one bundle's page, and its sections the drift page reuses.
//! - `drift`: two bundles compared, under a one-sentence headline.
//! - `provenance`: bundles, probe digest, version and time on every page.
//!
//! The example pairs show their image inline when the caller has its bytes:
//! [`Thumbnails`] holds a `data:` URI per probe line (made by
//! `crate::probe::thumbnails` for the lines [`calibration_example_lines`] or
//! [`drift_example_lines`] name).

mod calibration;
mod drift;
mod page;
mod provenance;

pub use calibration::{calibration_example_lines, calibration_html};
pub use drift::{drift_example_lines, drift_headline, drift_html, HeadlineThresholds};

/// Thumbnails as `data:` URIs, by the probe line of their image.
pub type Thumbnails = std::collections::BTreeMap<usize, String>;
pub use provenance::{rfc3339_utc, sha256_hex, Provenance};

#[cfg(test)]
mod tests {
    use super::*;
    use crate::stats::drift::{drift, DriftOptions};
    use crate::stats::pairs::tests::from_similarity;
    use crate::stats::{calibrate, CalibrationOptions};
    use ndarray::array;

    fn hostile() -> crate::stats::ProbeVectors {
        let mut v = from_similarity(&array![[0.8, 0.1], [0.2, 0.7]], vec![0, 1]);
        v.bundle = "<b>evil</b>".into();
        v.caption_texts[0] = "<script>alert('x')</script> & co".into();
        v.image_names[1] = "a\"b.png".into();
        v.contrasts = v.captions.slice(ndarray::s![1..2, ..]).to_owned();
        v.contrast_texts = vec!["<img src=x onerror=y>".into()];
        v.contrast_labels = vec!["<colour>".into()];
        v.contrast_from = vec![0];
        v
    }

    fn provenance() -> Provenance {
        let bundle = |id: &str| crate::stats::MapBundle {
            id: id.into(),
            digest: "sha256:<d>".into(),
        };
        Provenance::now(
            vec![bundle("<b>evil</b>"), bundle("new")],
            sha256_hex(b"abc"),
            2,
        )
    }

    fn assert_clean(html: &str) {
        assert!(html.starts_with("<!DOCTYPE html>"));
        assert!(!html.contains("<script"), "unescaped script");
        assert!(!html.contains("<img"), "unescaped img");
        assert!(!html.contains("<b>evil"), "unescaped bundle name");
        // Nothing fetched from anywhere: no URLs, no external resources.
        assert!(!html.contains("http"), "a URL in a self-contained report");
        assert!(!html.contains("<link") && !html.contains("@import") && !html.contains("src=\""));
    }

    #[test]
    fn calibration_page_escapes_text_and_stays_offline() {
        let r = calibrate(&hostile(), &CalibrationOptions::default()).unwrap();
        let html = calibration_html(&r, &provenance(), &Thumbnails::new());
        assert_clean(&html);
        assert!(html.contains("&lt;b&gt;evil&lt;/b&gt;"));
        // Provenance: the digest escaped, the probe's sha256, the version.
        assert!(html.contains("sha256:&lt;d&gt;"));
        assert!(html.contains("ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"));
        assert!(html.contains(&format!("befit {}", env!("CARGO_PKG_VERSION"))));
        assert!(html.contains("&lt;colour&gt;"));
        assert!(
            html.matches("<svg").count() >= 3,
            "histogram, recall and contrast plots"
        );
    }

    #[test]
    fn drift_page_escapes_captions_and_draws_the_scatter() {
        let v = hostile();
        let r = drift(&v, &v, &DriftOptions::default()).unwrap();
        let html = drift_html(&r, &provenance(), &Thumbnails::new());
        assert_clean(&html);
        // The same bundle twice: nothing moves, the swap looks safe, and the
        // two calibrations are folded away.
        assert!(
            html.contains("class=\"headline\">Rewards move by a median of 0 in cosine"),
            "{html}"
        );
        assert!(html.contains("the swap looks safe"));
        assert_eq!(html.matches("<details>").count(), 2);
        assert!(html.contains("&lt;script&gt;alert(&#39;x&#39;)&lt;/script&gt; &amp; co"));
        assert!(html.contains("a&quot;b.png"));
        assert!(html.contains("<circle"));
        assert!(html.contains("affine map"));
    }

    /// A thumbnail per example line, each naming its line so a test can tell them apart.
    fn fake_thumbnails(lines: &std::collections::BTreeSet<usize>) -> Thumbnails {
        lines
            .iter()
            .map(|l| (*l, format!("data:image/jpeg;base64,TElORS{l}")))
            .collect()
    }

    #[test]
    fn example_rows_show_their_own_image() {
        let r = calibrate(&hostile(), &CalibrationOptions::default()).unwrap();
        let lines = calibration_example_lines(&r);
        let rows: Vec<usize> = r
            .examples
            .lowest_true
            .iter()
            .chain(&r.examples.lost_contrasts)
            .map(|e| e.image_line)
            .collect();
        assert!(!rows.is_empty());
        let html = calibration_html(&r, &provenance(), &fake_thumbnails(&lines));
        assert_eq!(html.matches("<img class=\"thumb\"").count(), rows.len());
        for line in &rows {
            let cell = format!(
                "<img class=\"thumb\" src=\"data:image/jpeg;base64,TElORS{line}\" alt=\"probe image at line {line}\">"
            );
            assert!(html.contains(&cell), "line {line}");
        }
        // Without a thumbnail for a line, its row names the image only.
        let mut some = fake_thumbnails(&lines);
        let dropped = rows[0];
        some.remove(&dropped);
        let html = calibration_html(&r, &provenance(), &some);
        let shown_without = rows.iter().filter(|l| **l == dropped).count();
        assert_eq!(
            html.matches("<img class=\"thumb\"").count(),
            rows.len() - shown_without
        );
    }

    #[test]
    fn drift_examples_cover_moved_pairs_and_both_calibrations() {
        let v = hostile();
        let r = drift(&v, &v, &DriftOptions::default()).unwrap();
        let lines = drift_example_lines(&r);
        let moved: Vec<usize> = r.moved.iter().map(|p| p.image_line).collect();
        assert!(moved.iter().all(|l| lines.contains(l)));
        let examples = |c: &crate::stats::CalibrationReport| {
            c.examples.lowest_true.len() + c.examples.lost_contrasts.len()
        };
        let html = drift_html(&r, &provenance(), &fake_thumbnails(&lines));
        assert_eq!(
            html.matches("<img class=\"thumb\"").count(),
            moved.len() + examples(&r.from) + examples(&r.to)
        );
    }
}
