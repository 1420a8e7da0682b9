//! Durability of the caption bank against SIGKILL, at the library level: a
//! child process appends (and dumps now and then) while announcing every
//! append that returned; the parent kills it mid-stream, reopens the bank
//! and checks that every announced caption is there, in the store and the
//! index, that the index was loaded from a dump, and that SQLite's integrity
//! check passes; once per index backend. (The same test against the real
//! binary over HTTP is in `tests/integration/bank.rs`.)

use std::io::{BufRead, BufReader};
use std::process::{Command, Stdio};

use befit::bank::index::{GraphOrigin, IndexBackend, IndexParams};
use befit::bank::synthetic::SceneEmbedder;
use befit::bank::{BankConfig, BankQuery, CaptionBank, NewCaption, SearchMode};

const DIGEST: &str = "c0ffeec0ffeec0ffeec0ffeec0ffeec0ffeec0ffeec0ffeec0ffeec0ffeec0ff";
const DIM: usize = 32;
const CHILD_ENV: &str = "BEFIT_BANK_CRASH_CHILD_DIR";
const BACKEND_ENV: &str = "BEFIT_BANK_CRASH_BACKEND";

fn config(backend: IndexBackend) -> BankConfig {
    BankConfig {
        index: IndexParams::for_backend(backend),
        ..BankConfig::default()
    }
}

fn caption(e: &SceneEmbedder, i: usize) -> NewCaption {
    let text = format!("scene{} caption {i}", i % 97);
    NewCaption {
        vector: e.vector(&text),
        text,
        tag: Some(format!("t{}", i % 3)),
    }
}

/// The child's work: appends forever, printing one line per append that returned, until killed.
/// Not a test of its own (one that `cargo test` would run and pass without doing anything): the
/// crash test below runs it, in a copy of this test binary started with `CHILD_ENV` set.
fn append_until_killed(dir: &std::path::Path, backend: IndexBackend) -> ! {
    let bank = CaptionBank::open(dir, config(backend)).unwrap();
    let (model, _) = bank.model(DIGEST, DIM).unwrap();
    let e = SceneEmbedder::new(DIM, 97);
    for batch in 0.. {
        let captions: Vec<NewCaption> = (0..20).map(|j| caption(&e, batch * 20 + j)).collect();
        let appended = model.append(&captions).unwrap();
        let ids: Vec<String> = appended.iter().map(|a| a.id.to_string()).collect();
        println!("ACK {batch} {}", ids.join(","));
        if batch % 7 == 6 {
            bank.dump().unwrap();
        }
    }
    unreachable!("the batch counter does not end")
}

#[test]
fn every_acknowledged_append_survives_sigkill() {
    if let Some(dir) = std::env::var_os(CHILD_ENV) {
        let name = std::env::var(BACKEND_ENV).unwrap();
        append_until_killed(
            std::path::Path::new(&dir),
            IndexBackend::from_name(&name).unwrap(),
        );
    }
    for backend in IndexBackend::ALL {
        killed_while_appending(backend);
    }
}

fn killed_while_appending(backend: IndexBackend) {
    let dir = tempfile::tempdir().unwrap();
    // This same test, in a child process that sees CHILD_ENV and appends until it is killed.
    let mut child = Command::new(std::env::current_exe().unwrap())
        .args([
            "--exact",
            "every_acknowledged_append_survives_sigkill",
            "--nocapture",
            "--test-threads",
            "1",
        ])
        .env(CHILD_ENV, dir.path())
        .env(BACKEND_ENV, backend.name())
        .stdout(Stdio::piped())
        .stderr(Stdio::null())
        .spawn()
        .unwrap();
    let mut acked: Vec<(usize, Vec<u64>)> = Vec::new();
    let stdout = child.stdout.take().unwrap();
    for line in BufReader::new(stdout).lines() {
        let line = line.unwrap();
        let Some(rest) = line.strip_prefix("ACK ") else {
            continue;
        };
        let (batch, ids) = rest.split_once(' ').unwrap();
        acked.push((
            batch.parse().unwrap(),
            ids.split(',').map(|s| s.parse().unwrap()).collect(),
        ));
        // Past a few dumps, so the kill can land on a dump or an append.
        if acked.len() == 40 {
            child.kill().unwrap();
            break;
        }
    }
    // Killed by the signal (9, SIGKILL), not ended some other way before it.
    let status = child.wait().unwrap();
    assert_eq!(
        std::os::unix::process::ExitStatusExt::signal(&status),
        Some(9),
        "{status}"
    );
    assert_eq!(acked.len(), 40);

    let bank = CaptionBank::open(dir.path(), config(backend)).unwrap();
    assert_eq!(
        bank.store().integrity_check().unwrap(),
        vec!["ok".to_string()]
    );
    let (model, report) = bank.model(DIGEST, DIM).unwrap();
    let report = report.unwrap();
    assert!(report.rows >= 40 * 20, "{backend}: {report:?}");
    // Dumps were written every 7 appends, the first long before the kill.
    assert!(
        matches!(report.origin, GraphOrigin::Loaded { dumped, .. } if dumped >= 7 * 20),
        "{backend}: {report:?}"
    );
    let e = SceneEmbedder::new(DIM, 97);
    for (batch, ids) in &acked {
        for (j, id) in ids.iter().enumerate() {
            let c = caption(&e, batch * 20 + j);
            let stored = model
                .get(*id)
                .unwrap()
                .unwrap_or_else(|| panic!("{backend}: caption {id} lost"));
            assert_eq!(stored.text, c.text);
            let q = BankQuery {
                k: 1,
                mode: SearchMode::Index,
                ..Default::default()
            };
            let hits = model.search(&c.vector, &q).unwrap().hits;
            assert_eq!(hits[0].id, *id, "{backend}");
        }
    }
}
