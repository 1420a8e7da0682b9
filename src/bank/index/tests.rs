use std::collections::HashSet;

use super::*;
use crate::bank::exact::Neighbour;
use crate::bank::recall::index_recall;
use crate::bank::synthetic::{blocks_like, uniform_sphere};

const DIGEST_A: &str = "aaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaa";
const DIGEST_B: &str = "bbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbb";
const DIM: usize = 64;

fn rows_of(data: &[f32], first_id: RowId) -> Vec<(RowId, Vec<f32>)> {
    data.chunks(DIM)
        .enumerate()
        .map(|(i, v)| (first_id + i as RowId, v.to_vec()))
        .collect()
}

fn ids(hits: &[Neighbour]) -> Vec<RowId> {
    hits.iter().map(|h| h.id).collect()
}

/// Default settings on `backend`: every test runs on every backend.
fn with_backend(backend: IndexBackend) -> IndexParams {
    IndexParams::for_backend(backend)
}

/// Opens the index of `root` on `backend` and checks that it loaded its
/// dump of `dumped` rows and replayed `replayed` more.
fn open_loaded(
    root: &std::path::Path,
    backend: IndexBackend,
    source: &Vec<(RowId, Vec<f32>)>,
    dumped: usize,
    replayed: usize,
) -> VectorIndex {
    let (index, report) =
        VectorIndex::open(root, DIGEST_A, DIM, with_backend(backend), source).unwrap();
    assert_eq!(
        report.origin,
        GraphOrigin::Loaded { dumped, replayed },
        "{backend:?} loads its own dump"
    );
    index
}

/// Graph search only, so small test banks exercise HNSW and not the scan.
fn graph(k: usize) -> Search<'static> {
    Search {
        k,
        ef_search: None,
        mode: SearchMode::Index,
        only: None,
    }
}

#[test]
fn default_breadth_meets_the_recall_target_on_a_blocks_like_bank() {
    for backend in IndexBackend::ALL {
        let (bank, queries) = blocks_like(20_000, 200, DIM, 11);
        let index = VectorIndex::in_memory(DIGEST_A, DIM, with_backend(backend)).unwrap();
        index.insert(&rows_of(&bank, 1)).unwrap();
        let recall = index_recall(&index, &queries, 10, DEFAULT_EF_SEARCH).unwrap();
        assert!(
            recall >= 0.98,
            "recall@10 = {recall} at ef_search {DEFAULT_EF_SEARCH}"
        );
    }
}

#[test]
fn self_queries_and_duplicates_never_panic() {
    for backend in IndexBackend::ALL {
        let data = uniform_sphere(300, DIM, 3);
        let index = VectorIndex::in_memory(DIGEST_A, DIM, with_backend(backend)).unwrap();
        let mut rows = rows_of(&data, 1);
        // Every vector three times under different ids: exact duplicates.
        rows.extend(rows_of(&data, 1_001));
        rows.extend(rows_of(&data, 2_001));
        assert_eq!(index.insert(&rows).unwrap(), 900);
        // The graph is approximate and exact duplicates are its hard case:
        // a copy can be pruned from its twins' neighbour lists (the build
        // runs on two threads, so which one varies). Every search must
        // still start with a copy, and nearly all must find all three.
        let mut all_three = 0;
        for (id, v) in rows.iter().take(300) {
            let hits = index.search(v, &graph(3)).unwrap().hits;
            assert!(hits[0].cosine > 0.9999, "{backend:?} row {id}: {hits:?}");
            let copies = [*id, id + 1_000, id + 2_000];
            all_three += usize::from(copies.iter().all(|c| ids(&hits).contains(c)));
        }
        // usearch found all three for 289 to 300 of 300 rows in 15 runs,
        // and 291 to 300 in 80 runs through the copy with its strengthened
        // links (`flat_links`: no node was stranded; the twins a search
        // misses are reachable, but from far-off nodes the beam stops
        // short of), hnsw_rs always 300. 0.9 is this test's floor (chosen,
        // no source).
        assert!(
            all_three >= 270,
            "{backend:?}: all three copies found for {all_three} of 300 rows"
        );
        assert_eq!(
            index.insert(&rows[..5]).unwrap(),
            0,
            "same ids are not inserted twice"
        );
    }
}

#[test]
fn bad_vectors_and_settings_are_refused_with_errors() {
    for backend in IndexBackend::ALL {
        let index = VectorIndex::in_memory(DIGEST_A, 4, with_backend(backend)).unwrap();
        assert!(matches!(
            index.insert(&[(1, vec![1.0; 3])]),
            Err(IndexError::Dimension { got: 3, .. })
        ));
        assert!(matches!(
            index.insert(&[(1, vec![f32::NAN; 4])]),
            Err(IndexError::NotFinite { position: 0 })
        ));
        assert!(matches!(
            index.insert(&[(1, vec![0.0; 4])]),
            Err(IndexError::Zero)
        ));
        assert!(matches!(
            index.search(&[1.0; 4], &graph(0)),
            Err(IndexError::Setting { name: "k", .. })
        ));
        assert!(
            index.search(&[1.0; 4], &graph(5)).unwrap().hits.is_empty(),
            "an empty index answers nothing"
        );
        let bad = IndexParams {
            max_connections: 300,
            ..with_backend(backend)
        };
        assert!(VectorIndex::in_memory(DIGEST_A, 4, bad).is_err());
        assert!(matches!(
            VectorIndex::in_memory("../x", 4, with_backend(backend)),
            Err(IndexError::Digest(_))
        ));
    }
}

#[test]
fn dump_and_reload_answer_the_same_and_replay_later_rows() {
    for backend in IndexBackend::ALL {
        let root = tempfile::tempdir().unwrap();
        let data = uniform_sphere(3_000, DIM, 21);
        let mut source = rows_of(&data[..2_000 * DIM], 1);
        let (index, report) =
            VectorIndex::open(root.path(), DIGEST_A, DIM, with_backend(backend), &source).unwrap();
        assert!(matches!(report.origin, GraphOrigin::Built { .. }));
        let queries = uniform_sphere(20, DIM, 99);
        let before: Vec<Vec<RowId>> = queries
            .chunks(DIM)
            .map(|q| ids(&index.search(q, &graph(10)).unwrap().hits))
            .collect();
        let dumped = index.dump().unwrap();
        assert!(dumped.written);
        assert_eq!(dumped.rows, 2_000);
        assert!(
            !index.dump().unwrap().written,
            "nothing changed, nothing written"
        );
        drop(index);

        let index = open_loaded(root.path(), backend, &source, 2_000, 0);
        let after: Vec<Vec<RowId>> = queries
            .chunks(DIM)
            .map(|q| ids(&index.search(q, &graph(10)).unwrap().hits))
            .collect();
        assert_eq!(before, after, "a reloaded graph answers as the dumped one");
        drop(index);

        // Rows committed to the source after the dump are replayed at open.
        source.extend(rows_of(&data[2_000 * DIM..], 2_001));
        let index = open_loaded(root.path(), backend, &source, 2_000, 1_000);
        assert_eq!(index.stats().indexed, 3_000);
        for (id, v) in source.iter().skip(2_000).step_by(97) {
            assert_eq!(index.search(v, &graph(1)).unwrap().hits[0].id, *id);
        }
        assert!(
            index.dump().unwrap().written,
            "replayed rows make the dump stale"
        );
    }
}

#[test]
fn another_digest_or_settings_rebuild_instead_of_loading() {
    for backend in IndexBackend::ALL {
        let root = tempfile::tempdir().unwrap();
        let source = rows_of(&uniform_sphere(500, DIM, 5), 1);
        let (index, _) =
            VectorIndex::open(root.path(), DIGEST_A, DIM, with_backend(backend), &source).unwrap();
        index.dump().unwrap();
        drop(index);

        // A new bundle digest has its own folder: nothing to load there.
        let (_, report) =
            VectorIndex::open(root.path(), DIGEST_B, DIM, with_backend(backend), &source).unwrap();
        assert_eq!(
            report.origin,
            GraphOrigin::Built {
                reason: "no dump yet".into()
            }
        );

        // A dump copied under another digest's folder is refused by its manifest.
        let b_dir = root.path().join(DIGEST_B);
        std::fs::remove_dir_all(&b_dir).unwrap();
        copy_dir(&root.path().join(DIGEST_A), &b_dir);
        let (_, report) =
            VectorIndex::open(root.path(), DIGEST_B, DIM, with_backend(backend), &source).unwrap();
        assert!(
            matches!(&report.origin, GraphOrigin::Built { reason } if reason.contains("digest")),
            "{report:?}"
        );

        // Other build settings: rebuilt to honour them.
        let other = IndexParams {
            max_connections: 8,
            ..with_backend(backend)
        };
        let (_, report) = VectorIndex::open(root.path(), DIGEST_A, DIM, other, &source).unwrap();
        assert!(
            matches!(&report.origin, GraphOrigin::Built { reason } if reason.contains("M=16")),
            "{report:?}"
        );
    }
}

#[test]
fn a_store_that_lost_rows_makes_the_dump_unusable() {
    for backend in IndexBackend::ALL {
        let root = tempfile::tempdir().unwrap();
        let source = rows_of(&uniform_sphere(500, DIM, 6), 1);
        let (index, _) =
            VectorIndex::open(root.path(), DIGEST_A, DIM, with_backend(backend), &source).unwrap();
        index.dump().unwrap();
        drop(index);
        let fewer: Vec<_> = source[..400].to_vec();
        let (index, report) =
            VectorIndex::open(root.path(), DIGEST_A, DIM, with_backend(backend), &fewer).unwrap();
        assert!(
            matches!(&report.origin, GraphOrigin::Built { reason } if reason.contains("does not have")),
            "{report:?}"
        );
        assert_eq!(index.len(), 400);
    }
}

fn copy_dir(from: &std::path::Path, to: &std::path::Path) {
    std::fs::create_dir_all(to).unwrap();
    for e in std::fs::read_dir(from).unwrap() {
        let e = e.unwrap();
        let target = to.join(e.file_name());
        if e.path().is_dir() {
            copy_dir(&e.path(), &target);
        } else {
            std::fs::copy(e.path(), target).unwrap();
        }
    }
}

#[test]
fn truncated_or_garbled_dump_files_are_rebuilt_not_read() {
    for backend in IndexBackend::ALL {
        let data = uniform_sphere(800, DIM, 8);
        let source = rows_of(&data, 1);
        for damage in [
            "truncate-graph",
            "garble-data",
            "garble-manifest",
            "empty-current",
        ] {
            let root = tempfile::tempdir().unwrap();
            let (index, _) =
                VectorIndex::open(root.path(), DIGEST_A, DIM, with_backend(backend), &source)
                    .unwrap();
            let q = &data[..DIM];
            let expected = ids(&index.search(q, &graph(5)).unwrap().hits);
            index.dump().unwrap();
            drop(index);
            let digest_dir = root.path().join(DIGEST_A);
            let current = std::fs::read_to_string(digest_dir.join("CURRENT")).unwrap();
            let folder = digest_dir.join(current.trim());
            match damage {
                "truncate-graph" => {
                    let p = folder.join(&backend.dump_files()[0]);
                    let len = std::fs::metadata(&p).unwrap().len();
                    std::fs::OpenOptions::new()
                        .write(true)
                        .open(&p)
                        .unwrap()
                        .set_len(len / 2)
                        .unwrap();
                }
                "garble-data" => {
                    let p = folder.join(backend.dump_files().last().unwrap());
                    let mut bytes = std::fs::read(&p).unwrap();
                    for b in bytes.iter_mut().skip(10).step_by(7) {
                        *b ^= 0xA5;
                    }
                    std::fs::write(&p, bytes).unwrap();
                }
                "garble-manifest" => {
                    std::fs::write(folder.join("manifest.json"), b"\x00\x01garbage").unwrap()
                }
                _ => std::fs::write(digest_dir.join("CURRENT"), b"").unwrap(),
            }
            let (index, report) =
                VectorIndex::open(root.path(), DIGEST_A, DIM, with_backend(backend), &source)
                    .unwrap();
            assert!(
                matches!(report.origin, GraphOrigin::Built { .. }),
                "{damage}: {report:?}"
            );
            assert_eq!(index.len(), 800, "{damage}");
            assert_eq!(
                ids(&index.search(q, &graph(5)).unwrap().hits)[0],
                expected[0],
                "{damage}"
            );
        }
    }
}

#[test]
fn unusable_source_rows_are_skipped_and_counted() {
    for backend in IndexBackend::ALL {
        let root = tempfile::tempdir().unwrap();
        let mut source = rows_of(&uniform_sphere(10, DIM, 1), 1);
        source.push((100, vec![f32::NAN; DIM]));
        source.push((101, vec![1.0; 3]));
        let (index, report) =
            VectorIndex::open(root.path(), DIGEST_A, DIM, with_backend(backend), &source).unwrap();
        assert_eq!((report.rows, report.skipped), (10, 2));
        assert_eq!(report.skipped_ids, vec![100, 101]);
        assert_eq!(index.len(), 10);
    }
}

#[test]
fn tag_filters_only_return_allowed_rows_whatever_their_size() {
    for backend in IndexBackend::ALL {
        let (bank, queries) = blocks_like(6_000, 20, DIM, 4);
        let params = IndexParams {
            exact_below: 500,
            ..with_backend(backend)
        };
        let index = VectorIndex::in_memory(DIGEST_A, DIM, params).unwrap();
        index.insert(&rows_of(&bank, 1)).unwrap();
        let narrow: HashSet<RowId> = (1..=6_000).filter(|i| i % 50 == 0).collect();
        let wide: HashSet<RowId> = (1..=6_000).filter(|i| i % 3 == 0).collect();
        // Both ways of walking the graph with a filter, over three set widths
        // (2%, 14% and 33% of the bank; the 2% set is scanned exactly).
        let sparse: HashSet<RowId> = (1..=6_000).filter(|i| i % 7 == 0).collect();
        for (walk, only) in [FilterWalk::Within, FilterWalk::OverFetch]
            .into_iter()
            .flat_map(|w| [(w, &narrow), (w, &wide), (w, &sparse)])
        {
            for q in queries.chunks(DIM) {
                let search = Search {
                    k: 10,
                    ef_search: None,
                    mode: SearchMode::Auto,
                    only: Some(only),
                };
                let got = index.search_walking(q, &search, walk).unwrap();
                assert_eq!(got.hits.len(), 10, "{walk:?}");
                assert!(got.hits.iter().all(|h| only.contains(&h.id)));
                let exact = index.exact(q, 10, Some(only)).unwrap();
                let recall = crate::bank::recall::recall_of_query(
                    &exact.iter().map(|h| h.cosine).collect::<Vec<_>>(),
                    &got.hits.iter().map(|h| h.cosine).collect::<Vec<_>>(),
                    10,
                );
                assert!(recall >= 0.8, "{walk:?}: filtered recall {recall}");
            }
        }
        let search = Search {
            k: 10,
            ef_search: None,
            mode: SearchMode::Auto,
            only: Some(&narrow),
        };
        assert_eq!(
            index.search(&queries[..DIM], &search).unwrap().answered,
            Answered::Exact
        );
    }
}

#[test]
fn batched_searches_answer_each_query_as_a_single_search_does() {
    for backend in IndexBackend::ALL {
        let (bank, queries) = blocks_like(3_000, 30, DIM, 6);
        let params = IndexParams {
            exact_below: 200,
            ..with_backend(backend)
        };
        let index = VectorIndex::in_memory(DIGEST_A, DIM, params).unwrap();
        index.insert(&rows_of(&bank, 1)).unwrap();
        let queries: Vec<Vec<f32>> = queries.chunks(DIM).map(<[f32]>::to_vec).collect();
        let narrow: HashSet<RowId> = (1..=3_000).filter(|i| i % 40 == 0).collect();
        let wide: HashSet<RowId> = (1..=3_000).filter(|i| i % 2 == 0).collect();
        for (mode, only) in [
            (SearchMode::Exact, None),
            (SearchMode::Exact, Some(&narrow)),
            (SearchMode::Exact, Some(&wide)),
            (SearchMode::Auto, Some(&narrow)),
            (SearchMode::Index, None),
        ] {
            let search = Search {
                k: 10,
                ef_search: None,
                mode,
                only,
            };
            let batched = index.search_many(&queries, &search).unwrap();
            assert_eq!(batched.len(), queries.len());
            for (q, got) in queries.iter().zip(&batched) {
                assert_eq!(got, &index.search(q, &search).unwrap());
            }
        }
        let none: Vec<Vec<f32>> = Vec::new();
        assert!(matches!(
            index.search_many(&none, &Search::top(3)),
            Err(IndexError::Setting {
                name: "queries",
                ..
            })
        ));
        let short = vec![queries[0].clone(), vec![1.0; DIM - 1]];
        assert!(matches!(
            index.search_many(&short, &Search::top(3)),
            Err(IndexError::Dimension { .. })
        ));
    }
}

#[test]
fn auto_mode_scans_small_banks_exactly() {
    for backend in IndexBackend::ALL {
        let index = VectorIndex::in_memory(DIGEST_A, DIM, with_backend(backend)).unwrap();
        index
            .insert(&rows_of(&uniform_sphere(100, DIM, 2), 1))
            .unwrap();
        let q = uniform_sphere(1, DIM, 77);
        assert_eq!(
            index.search(&q, &Search::top(5)).unwrap().answered,
            Answered::Exact
        );
        assert_eq!(
            index.search(&q, &graph(5)).unwrap().answered,
            Answered::Index
        );
    }
}

#[test]
fn concurrent_inserts_and_searches_find_every_inserted_row() {
    for backend in IndexBackend::ALL {
        let index = std::sync::Arc::new(
            VectorIndex::in_memory(DIGEST_A, DIM, with_backend(backend)).unwrap(),
        );
        let data = uniform_sphere(4_000, DIM, 31);
        let rows = rows_of(&data, 1);
        index.insert(&rows[..1_000]).unwrap();
        let done = std::sync::Arc::new(AtomicBool::new(false));
        let searcher = {
            let (index, done) = (index.clone(), done.clone());
            let queries = uniform_sphere(50, DIM, 5);
            std::thread::spawn(move || {
                let mut n = 0;
                while !done.load(Ordering::SeqCst) {
                    for q in queries.chunks(DIM) {
                        assert!(!index.search(q, &graph(10)).unwrap().hits.is_empty());
                        n += 1;
                    }
                }
                n
            })
        };
        for chunk in rows[1_000..].chunks(50) {
            index.insert(chunk).unwrap();
            for (id, v) in chunk {
                assert!(index.contains(*id));
                assert_eq!(index.search(v, &graph(1)).unwrap().hits[0].id, *id);
            }
        }
        done.store(true, Ordering::SeqCst);
        assert!(searcher.join().unwrap() > 0);
        assert_eq!(index.stats().indexed, 4_000);
    }
}

#[test]
fn a_build_gives_up_when_asked_to_stop_and_the_next_open_builds_it() {
    for backend in IndexBackend::ALL {
        let root = tempfile::tempdir().unwrap();
        let source = rows_of(&uniform_sphere(10_000, DIM, 12), 1);
        let stop = std::sync::atomic::AtomicBool::new(false);
        let started = std::time::Instant::now();
        let asked = std::thread::scope(|s| {
            // Asked to stop shortly after the build began (the service got SIGTERM).
            s.spawn(|| {
                std::thread::sleep(std::time::Duration::from_millis(30));
                stop.store(true, std::sync::atomic::Ordering::Relaxed);
            });
            VectorIndex::open_until(
                root.path(),
                DIGEST_A,
                DIM,
                with_backend(backend),
                &source,
                &stop,
            )
        });
        let stopped_after = started.elapsed();
        assert!(matches!(asked, Err(IndexError::Stopped)), "{asked:?}");
        // The full build, for comparison (same rows, same machine, same run).
        let started = std::time::Instant::now();
        let (index, report) =
            VectorIndex::open(root.path(), DIGEST_A, DIM, with_backend(backend), &source).unwrap();
        let built_after = started.elapsed();
        assert_eq!(index.len(), 10_000);
        assert!(matches!(report.origin, GraphOrigin::Built { .. }));
        assert!(
            stopped_after * 3 < built_after,
            "stopping took {stopped_after:?} of a {built_after:?} build"
        );
    }
}

#[test]
fn switching_backend_at_start_rebuilds_and_each_reloads_only_its_own_dump() {
    let root = tempfile::tempdir().unwrap();
    let data = uniform_sphere(600, DIM, 31);
    let source = rows_of(&data, 1);
    let q = &data[5 * DIM..6 * DIM];
    let [first, second] = IndexBackend::ALL;
    for (from, to) in [(first, second), (second, first)] {
        let (index, _) =
            VectorIndex::open(root.path(), DIGEST_A, DIM, with_backend(from), &source).unwrap();
        // The first round builds and writes; the second loads the dump the
        // first round's rebuild wrote, so there is nothing new to write.
        index.dump().unwrap();
        drop(index);
        let (index, report) =
            VectorIndex::open(root.path(), DIGEST_A, DIM, with_backend(to), &source).unwrap();
        let expected_reason = format!("the {from} backend, this index uses {to}");
        assert!(
            matches!(&report.origin, GraphOrigin::Built { reason } if reason.contains(&expected_reason)),
            "{from} -> {to}: {report:?}"
        );
        assert_eq!(index.len(), 600);
        assert_eq!(index.search(q, &graph(1)).unwrap().hits[0].id, 6, "{to}");
        assert!(
            index.dump().unwrap().written,
            "the rebuilt {to} graph is dumped"
        );
        drop(index);
        let index = open_loaded(root.path(), to, &source, 600, 0);
        assert_eq!(index.search(q, &graph(1)).unwrap().hits[0].id, 6, "{to}");
    }
}

#[test]
fn searches_go_through_the_flat_copy_and_its_tail_sees_every_row() {
    for backend in IndexBackend::ALL {
        let (bank, queries) = blocks_like(6_500, 100, DIM, 5);
        let index = VectorIndex::in_memory(DIGEST_A, DIM, with_backend(backend)).unwrap();
        index.insert(&rows_of(&bank[..4_000 * DIM], 1)).unwrap();
        if !backend.makes_flat_copy() {
            assert!(index.copy().is_none(), "{backend:?} makes no copy");
            continue;
        }
        let first = index.copy().expect("a copy after the first insert");
        assert_eq!(first.covers, 4_000);
        // Through the copy, the recall target of the library's own graph
        // (0.98 at the default breadth, as the first test of this file).
        let recall = index_recall(&index, &queries, 10, DEFAULT_EF_SEARCH).unwrap();
        assert!(
            recall >= 0.98,
            "{backend:?} recall@10 = {recall} through the copy"
        );

        // Fewer new rows than the tail limit: the same copy, and each new row
        // is found first by its own vector through the exact scan of the tail.
        let limit = index.tail_limit(4_000);
        let later = rows_of(&bank[4_000 * DIM..(4_000 + limit) * DIM], 4_001);
        index.insert(&later).unwrap();
        let same = index.copy().unwrap();
        assert!(
            std::sync::Arc::ptr_eq(&first, &same),
            "renewed before the tail passed {limit}"
        );
        for (id, v) in later.iter().step_by(37) {
            let hits = index.search(v, &graph(3)).unwrap().hits;
            assert_eq!(
                hits[0].id, *id,
                "{backend:?}: a tail row is found by itself"
            );
            assert_eq!(hits.len(), 3);
        }

        // One row more than the limit renews the copy over every row.
        let next = 4_001 + limit as RowId;
        index
            .insert(&rows_of(
                &bank[(4_000 + limit) * DIM..(4_001 + limit) * DIM],
                next,
            ))
            .unwrap();
        let renewed = index.copy().unwrap();
        assert_eq!(renewed.covers, 4_001 + limit);
        assert_eq!(
            index
                .search(
                    &bank[(4_000 + limit) * DIM..(4_001 + limit) * DIM],
                    &graph(1)
                )
                .unwrap()
                .hits[0]
                .id,
            next
        );
    }
}

#[test]
fn the_exact_scan_threshold_shrinks_as_vectors_grow() {
    // Measured crossovers with usearch's copy (BENCHMARKS.md): 2000 rows at
    // 64-d, 250 at 512-d.
    let params = with_backend(IndexBackend::Usearch);
    let at = |dim| {
        VectorIndex::in_memory(DIGEST_A, dim, params)
            .unwrap()
            .exact_below_rows()
    };
    assert_eq!(at(64), 2_000);
    assert_eq!(at(512), 250);
    let index = VectorIndex::in_memory(DIGEST_A, 512, params).unwrap();
    let (bank, _) = blocks_like(300, 1, 512, 3);
    let rows: Vec<(RowId, Vec<f32>)> = bank
        .chunks(512)
        .enumerate()
        .map(|(i, v)| (i as RowId + 1, v.to_vec()))
        .collect();
    index.insert(&rows).unwrap();
    let auto = Search {
        k: 3,
        ef_search: None,
        mode: SearchMode::Auto,
        only: None,
    };
    let answer = index.search(&bank[..512], &auto).unwrap();
    assert_eq!(
        answer.answered,
        Answered::Index,
        "300 rows of 512-d pass 250"
    );
    assert_eq!(index.stats().exact_below_rows, 250);
}

#[test]
fn a_tag_is_scanned_while_scanning_it_costs_less_than_over_fetching() {
    // `filter_exact_below`'s balance, t^2 = max(ef, 2k) n r (derived in its
    // doc), checked on the routing it decides: a tag one row inside the
    // limit is scanned, one row past it goes to the graph, and the limit
    // doubles when the bank, the breadth or (past ef) k grows fourfold.
    let mut params = with_backend(IndexBackend::Usearch);
    params.exact_below = 64;
    let index = VectorIndex::in_memory(DIGEST_A, DIM, params).unwrap();
    let (bank, _) = blocks_like(4_000, 1, DIM, 3);
    let k = 10;
    let ef = 16;
    let tag_of = |rows: usize| -> HashSet<RowId> { (1..=rows as RowId).collect() };
    let scanned = |index: &VectorIndex, rows: usize, ef: usize| {
        let only = tag_of(rows);
        index.answers_exactly(&Search {
            k,
            ef_search: Some(ef),
            mode: SearchMode::Index,
            only: Some(&only),
        })
    };
    let r = IndexBackend::Usearch.scan_rows_per_breadth();

    index.insert(&rows_of(&bank[..1_000 * DIM], 1)).unwrap();
    // Breadth max(16, 2 x 10) = 20.
    let small = index.filter_exact_below(k, ef);
    assert_eq!(small, (20.0 * 1_000.0 * r).sqrt() as usize);
    assert!(small > 64, "the balance passes exact_below here: {small}");
    assert!(scanned(&index, small, ef));
    assert!(!scanned(&index, small + 1, ef));
    // A wider search over-fetches more widely: the scan keeps more tags.
    let wide = index.filter_exact_below(k, 80);
    assert!(wide.abs_diff(2 * small) <= 2, "{small} -> {wide}");
    assert!(scanned(&index, wide, 80) && !scanned(&index, wide + 1, 80));

    index.insert(&rows_of(&bank[1_000 * DIM..], 1_001)).unwrap();
    let large = index.filter_exact_below(k, ef);
    assert!(large.abs_diff(2 * small) <= 2, "{small} -> {large}");
    assert!(scanned(&index, large, ef) && !scanned(&index, large + 1, ef));
    // More hits asked for mean a wider over-fetch once 2k passes ef.
    assert!(index.filter_exact_below(4 * k, ef).abs_diff(2 * large) <= 2);

    // The answer past the limit still has k hits (over-fetched, or the
    // scan when too few tagged rows came back), best first.
    let only = tag_of(large + 1);
    let search = Search {
        k,
        ef_search: Some(ef),
        mode: SearchMode::Index,
        only: Some(&only),
    };
    let hits = index.search(&bank[..DIM], &search).unwrap().hits;
    assert_eq!(hits.len(), k);
    assert!(hits.iter().all(|h| only.contains(&h.id)));
    assert!(hits.windows(2).all(|w| w[0].cosine >= w[1].cosine));

    // exact_below 0 turns the choice off; an empty tag is always scanned.
    params.exact_below = 0;
    let graph_only = VectorIndex::in_memory(DIGEST_A, DIM, params).unwrap();
    graph_only
        .insert(&rows_of(&bank[..1_000 * DIM], 1))
        .unwrap();
    assert_eq!(graph_only.filter_exact_below(k, ef), 0);
    assert!(!scanned(&graph_only, 10, ef));
    assert!(scanned(&graph_only, 0, ef));
}

#[test]
fn an_over_fetched_tag_keeps_the_recall_of_an_unfiltered_search() {
    // Over-fetching searches at max(ef, 2k) / share, so a tag's hits should
    // be about as near the best as an unfiltered search's at ef: checked
    // against the exact scan of the tag's rows (recall counted as
    // everywhere here, ann-benchmarks' threshold rule), for tags of 5 to
    // 25 % sent to the graph (exact_below 0). The tolerance, 0.02, is a
    // choice: under one breadth step's gain at this size.
    for backend in IndexBackend::ALL {
        let mut params = with_backend(backend);
        params.exact_below = 0;
        let index = VectorIndex::in_memory(DIGEST_A, DIM, params).unwrap();
        let (bank, queries) = blocks_like(8_000, 60, DIM, 21);
        index.insert(&rows_of(&bank, 1)).unwrap();
        let ef = 128;
        let unfiltered = index_recall(&index, &queries, 10, ef).unwrap();
        for every in [4, 10, 20] {
            let only: HashSet<RowId> = (1..=8_000).filter(|id| id % every == 0).collect();
            let search = Search {
                k: 10,
                ef_search: Some(ef),
                mode: SearchMode::Index,
                only: Some(&only),
            };
            assert_eq!(
                index.over_fetch_breadth(ef, 10, only.len()),
                ef * every as usize,
                "breadth ef / share"
            );
            let mut exact = Vec::new();
            let mut found = Vec::new();
            for q in queries.chunks(DIM) {
                let answer = index.search(q, &search).unwrap();
                assert_eq!(answer.answered, Answered::Index);
                assert!(answer.hits.iter().all(|h| only.contains(&h.id)));
                found.push(answer.hits.iter().map(|h| h.cosine).collect::<Vec<_>>());
                let truth = index.exact(q, 10, Some(&only)).unwrap();
                exact.push(truth.iter().map(|h| h.cosine).collect::<Vec<_>>());
            }
            let recall = crate::bank::recall::mean_recall(&exact, &found, 10);
            assert!(
                recall >= unfiltered - 0.02,
                "{backend:?}: a tag on 1 row in {every}: recall@10 {recall}, unfiltered {unfiltered}"
            );
        }
    }
}

#[test]
fn memory_by_part_counts_each_copy_of_the_vectors() {
    // Floor for every part that holds the vectors: n rows of DIM f32, 4
    // bytes each (IEEE 754 binary32). Ceilings: the exact matrix grows by
    // doubling (so below 2x plus the id map), usearch's tapes are counted
    // without their untouched reserve, the copy adds its links.
    const N: usize = 3_000;
    let vectors = N * DIM * std::mem::size_of::<f32>();
    for backend in IndexBackend::ALL {
        let (bank, _) = blocks_like(N, 1, DIM, 9);
        let index = VectorIndex::in_memory(DIGEST_A, DIM, with_backend(backend)).unwrap();
        let empty = index.memory();
        assert_eq!(empty.exact_rows, 0, "{backend:?}: nothing held yet");
        index.insert(&rows_of(&bank, 1)).unwrap();
        let m = index.memory();
        assert!(
            m.exact_rows >= vectors + N * std::mem::size_of::<RowId>(),
            "{backend:?}: {m:?}"
        );
        assert!(m.exact_rows < 3 * vectors, "{backend:?}: {m:?}");
        match backend {
            IndexBackend::Usearch => {
                let library = m.library.expect("usearch counts its memory");
                assert!(
                    library.vectors >= vectors && library.vectors < 2 * vectors,
                    "{m:?}"
                );
                assert!(library.graph > 0, "{m:?}");
                let copy = index.copy().expect("usearch makes a copy");
                assert_eq!(m.copy, copy.copy.bytes());
                assert!(m.copy > vectors, "{m:?}");
            }
            IndexBackend::HnswRs => {
                assert_eq!(m.library, None, "hnsw_rs does not count its memory");
                assert_eq!(m.copy, 0, "hnsw_rs makes no copy");
            }
        }
    }
}
