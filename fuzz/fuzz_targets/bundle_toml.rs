//! `bundle.toml`: any text parses into a checked manifest or a typed error
//! naming the field; never a panic. A manifest that parses and names a file
//! outside its folder is refused by the file check before any file is opened.
#![no_main]

use std::path::{Component, Path};

use befit::bundle::Manifest;
use libfuzzer_sys::fuzz_target;

fuzz_target!(|data: &[u8]| {
    let Ok(text) = std::str::from_utf8(data) else {
        return;
    };
    let Ok(manifest) = Manifest::parse(text, Path::new("bundle.toml")) else {
        return;
    };
    // What the checks promise of a manifest they accept.
    assert!(manifest.model.dimension >= 1);
    assert!(manifest.image.size >= 1);
    assert!(manifest.text.max_tokens >= 1);
    assert!(manifest.image.std.iter().all(|s| *s > 0.0 && s.is_finite()));
    let escapes = manifest.files().iter().any(|(_, file)| {
        let p = Path::new(file);
        p.is_absolute() || p.components().any(|c| matches!(c, Component::ParentDir))
    });
    let checked = manifest.check_files(Path::new("/nonexistent-befit-bundle"), Path::new("x"));
    let message = checked.expect_err("no file exists there").to_string();
    assert_eq!(
        escapes,
        message.contains("inside the bundle folder"),
        "{message}"
    );
});
