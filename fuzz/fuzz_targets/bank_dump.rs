//! The caption bank's dump loader: a dump whose manifest, graph or data file
//! is damaged (replaced, truncated or patched) is either loaded or set aside
//! and rebuilt from the store. Either way the index opens with every row of
//! the store, and an exact search finds each row itself.
//!
//! The damage is what a disk or a crash does: the manifest's checksums are
//! left as they were. With forged checksums, hnsw_rs 0.3.5's reader (which
//! trusts its input) can abort on a length field or exit on a format byte;
//! the manifest's sha256 gate is what keeps such files from it (BENCHMARKS.md,
//! "Fuzzing").
#![no_main]

use std::fs;
use std::path::{Path, PathBuf};
use std::sync::LazyLock;

use befit::bank::dump::{CURRENT_FILE, MANIFEST_FILE};
use befit::bank::{IndexParams, Search, SearchMode, VectorIndex};
use libfuzzer_sys::fuzz_target;

/// A bundle digest: 64 hex digits.
const DIGEST: &str = "f00dfeedf00dfeedf00dfeedf00dfeedf00dfeedf00dfeedf00dfeedf00dfeed";
const DIM: usize = 8;
const ROWS: u64 = 40;

type Rows = Vec<(u64, Vec<f32>)>;

fn params() -> IndexParams {
    IndexParams {
        build_threads: 1,
        exact_below: 0,
        ..IndexParams::default()
    }
}

/// A dump of ROWS seeded vectors, written once.
static TEMPLATE: LazyLock<(tempfile::TempDir, Rows)> = LazyLock::new(|| {
    let rows: Rows = (0..ROWS)
        .map(|id| {
            let v = (0..DIM)
                .map(|j| ((id * 31 + j as u64 * 7) % 97) as f32 - 48.0 + 0.5)
                .collect();
            (id, v)
        })
        .collect();
    let root = tempfile::tempdir().expect("a temporary folder");
    let (index, _) = VectorIndex::open(root.path(), DIGEST, DIM, params(), &rows).expect("opens");
    index.dump().expect("dumps");
    (root, rows)
});

fn copy_dir(from: &Path, to: &Path) {
    fs::create_dir_all(to).unwrap();
    for entry in fs::read_dir(from).unwrap() {
        let entry = entry.unwrap();
        let target = to.join(entry.file_name());
        if entry.file_type().unwrap().is_dir() {
            copy_dir(&entry.path(), &target);
        } else {
            fs::copy(entry.path(), target).unwrap();
        }
    }
}

/// The dump folder CURRENT names, and its manifest as JSON.
fn dump_folder(digest_dir: &Path) -> (PathBuf, serde_json::Value) {
    let name = fs::read_to_string(digest_dir.join(CURRENT_FILE)).unwrap();
    let folder = digest_dir.join(name.trim());
    let manifest = fs::read_to_string(folder.join(MANIFEST_FILE)).unwrap();
    (folder, serde_json::from_str(&manifest).unwrap())
}

/// hnsw_rs asserts (and overflows capacities) on a damaged graph file, and
/// befit catches those panics (`src/bank/index/hnsw.rs`) and rebuilds.
/// libFuzzer's hook aborts on any panic, caught or not; this one only prints
/// the panics that are not hnsw_rs's. A panic befit fails to catch still ends
/// the run: libfuzzer-sys aborts when one unwinds out of the target.
static PANIC_HOOK: LazyLock<()> = LazyLock::new(|| {
    std::panic::set_hook(Box::new(|info| {
        let file = info.location().map(|l| l.file()).unwrap_or("");
        if !(file.contains("/hnsw_rs-") || file.contains("library/alloc/")) {
            eprintln!("{info}");
        }
    }));
});

fuzz_target!(|data: &[u8]| {
    let Some((&how, damage)) = data.split_first() else {
        return;
    };
    LazyLock::force(&PANIC_HOOK);
    let (template, rows) = &*TEMPLATE;
    let scratch = tempfile::tempdir().unwrap();
    copy_dir(template.path(), scratch.path());
    let digest_dir = scratch.path().join(DIGEST);
    let (folder, manifest) = dump_folder(&digest_dir);
    let files: Vec<String> = manifest["files"]
        .as_array()
        .unwrap()
        .iter()
        .map(|f| f["name"].as_str().unwrap().to_string())
        .collect();
    let target = match how % 3 {
        0 => folder.join(MANIFEST_FILE),
        which => folder.join(&files[(usize::from(which) - 1) % files.len()]),
    };
    if how & 0x80 != 0 {
        // Replaced whole (garbage, or truncated when short).
        fs::write(&target, damage).unwrap();
    } else {
        // Patched: (offset, byte) triples, offsets taken modulo the file's length.
        let mut bytes = fs::read(&target).unwrap();
        for patch in damage.chunks_exact(3) {
            if bytes.is_empty() {
                break;
            }
            let at = usize::from(u16::from_le_bytes([patch[0], patch[1]])) % bytes.len();
            bytes[at] = patch[2];
        }
        fs::write(&target, bytes).unwrap();
    }
    let (index, report) = VectorIndex::open(scratch.path(), DIGEST, DIM, params(), rows)
        .expect("a damaged dump is set aside, never a failed open");
    assert_eq!(index.len(), rows.len(), "{report:?}");
    let exact = Search {
        mode: SearchMode::Exact,
        ..Search::top(1)
    };
    let graph = Search {
        mode: SearchMode::Index,
        ..Search::top(5)
    };
    for (id, v) in rows.iter().step_by(7) {
        let found = index.search(v, &exact).expect("an exact search answers");
        assert_eq!(found.hits.first().map(|h| h.id), Some(*id));
        // Through a graph that passed the loader's checks: an answer or a typed error.
        if let Ok(found) = index.search(v, &graph) {
            assert!(found.hits.len() <= 5);
        }
    }
});
