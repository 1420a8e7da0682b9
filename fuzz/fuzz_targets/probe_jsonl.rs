//! Probe sets as JSON Lines: any bytes give a probe set whose rows are
//! consistent, or a typed error naming the line; never a panic.
#![no_main]

use std::path::Path;

use befit::probe::{LoadOptions, ProbeSet};
use libfuzzer_sys::fuzz_target;

fuzz_target!(|data: &[u8]| {
    let Some((&flags, bytes)) = data.split_first() else {
        return;
    };
    let options = LoadOptions {
        skip_bad: flags & 1 == 1,
        check_files: false,
    };
    if let Ok(loaded) = ProbeSet::parse(bytes, Path::new(""), "fuzz", &options) {
        assert!(!loaded.set.rows.is_empty());
        let lines = bytes.split(|&b| b == b'\n').count();
        for row in &loaded.set.rows {
            assert!(
                row.line >= 1 && row.line <= lines,
                "line {} of {lines}",
                row.line
            );
        }
    }
});
