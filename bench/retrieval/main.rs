//! Retrieval benchmark, befit's side: builds the caption index (the
//! `--backend` graph, hnsw-rs or usearch, through
//! `befit::bank::VectorIndex`) and the exact scan over seeded
//! vectors, and reports build time, queries per second and recall@k at
//! several search breadths as JSON lines. It writes the vectors and the exact
//! answers as .npy files so `hnswlib_side.py` runs hnswlib on the very same
//! data; `run.py` runs both and prints the ratios.
//!
//! `cargo bench --bench retrieval -- --sizes 100000 --out target/retrieval`
//! (`--crossover` instead measures where the exact scan stops being faster;
//! `--batched` measures the exact scan of a batch of queries and of single
//! queries at each of `--dims`, for `exact_run.py` to set beside numpy;
//! `--filtered` measures tag-filtered search, the graph walked with the
//! filter against over-fetching, at several tag shares; `--flat`, with the
//! usearch backend, also freezes a flat copy of the graph and measures its
//! searches at each breadth right after usearch's, lines marked
//! `"copy": "flat"`).

use std::io::Write;
use std::path::{Path, PathBuf};
use std::time::Instant;

use befit::bank::exact::{ExactRows, Neighbour};
use befit::bank::index::{
    Answered, FilterWalk, IndexBackend, IndexError, IndexParams, Search, SearchMode, VectorIndex,
    DEFAULT_EF_SEARCH,
};
use befit::bank::recall::mean_recall;
use befit::bank::synthetic::{blocks_like, uniform_sphere};
use befit::bank::RowId;

const DIGEST: &str = "0000000000000000000000000000000000000000000000000000000000000000";

struct Args {
    sizes: Vec<usize>,
    kinds: Vec<String>,
    dim: usize,
    queries: usize,
    k: usize,
    m: usize,
    ef_construction: usize,
    ef_search: Vec<usize>,
    threads: usize,
    query_threads: usize,
    out: PathBuf,
    crossover: bool,
    dump: bool,
    batched: bool,
    filtered: bool,
    dims: Vec<usize>,
    singles: usize,
    backend: IndexBackend,
    flat: bool,
}

fn list<T: std::str::FromStr>(s: &str) -> Vec<T> {
    s.split(',').filter_map(|x| x.trim().parse().ok()).collect()
}

fn parse_args() -> Args {
    let mut a = Args {
        sizes: vec![100_000, 1_000_000],
        kinds: vec!["uniform".into(), "blocks".into()],
        dim: 64,
        queries: 1_000,
        k: 10,
        m: 16,
        ef_construction: 200,
        ef_search: vec![16, 32, 64, 96, 128, 256],
        threads: 2,
        query_threads: 1,
        out: PathBuf::from("target/retrieval"),
        crossover: false,
        dump: true,
        batched: false,
        filtered: false,
        dims: vec![64, 512],
        singles: 100,
        backend: IndexBackend::default(),
        flat: false,
    };
    let mut it = std::env::args().skip(1);
    while let Some(flag) = it.next() {
        let mut value = || it.next().unwrap_or_default();
        match flag.as_str() {
            "--sizes" => a.sizes = list(&value()),
            "--kinds" => a.kinds = value().split(',').map(str::to_string).collect(),
            "--dim" => a.dim = value().parse().unwrap_or(a.dim),
            "--queries" => a.queries = value().parse().unwrap_or(a.queries),
            "--k" => a.k = value().parse().unwrap_or(a.k),
            "--m" => a.m = value().parse().unwrap_or(a.m),
            "--ef-construction" => a.ef_construction = value().parse().unwrap_or(a.ef_construction),
            "--ef-search" => a.ef_search = list(&value()),
            "--threads" => a.threads = value().parse().unwrap_or(a.threads),
            "--query-threads" => {
                a.query_threads = value().parse().unwrap_or(a.query_threads).max(1)
            }
            "--out" => a.out = PathBuf::from(value()),
            "--crossover" => a.crossover = true,
            "--no-dump" => a.dump = false,
            "--batched" => a.batched = true,
            "--filtered" => a.filtered = true,
            "--flat" => a.flat = true,
            "--dims" => a.dims = list(&value()),
            "--singles" => a.singles = value().parse().unwrap_or(a.singles),
            "--backend" => {
                let name = value();
                a.backend = IndexBackend::from_name(&name).unwrap_or_else(|| {
                    eprintln!("unknown backend {name:?}, using {}", a.backend);
                    a.backend
                });
            }
            // cargo bench passes --bench to harness-less benchmarks.
            "--bench" => {}
            other => eprintln!("ignoring unknown argument {other}"),
        }
    }
    a
}

/// Writes a C-order float32 or int64 array as .npy (format version 1.0).
fn write_npy(path: &Path, descr: &str, shape: (usize, usize), bytes: &[u8]) -> std::io::Result<()> {
    let mut header = format!(
        "{{'descr': '{descr}', 'fortran_order': False, 'shape': ({}, {}), }}",
        shape.0, shape.1
    );
    let unpadded = 10 + header.len() + 1;
    header.push_str(&" ".repeat((64 - unpadded % 64) % 64));
    header.push('\n');
    let mut f = std::io::BufWriter::new(std::fs::File::create(path)?);
    f.write_all(b"\x93NUMPY\x01\x00")?;
    f.write_all(&(header.len() as u16).to_le_bytes())?;
    f.write_all(header.as_bytes())?;
    f.write_all(bytes)?;
    f.flush()
}

fn f32_bytes(v: &[f32]) -> Vec<u8> {
    v.iter().flat_map(|x| x.to_le_bytes()).collect()
}

fn data(kind: &str, n: usize, queries: usize, dim: usize) -> (Vec<f32>, Vec<f32>) {
    match kind {
        "uniform" => (uniform_sphere(n, dim, 1), uniform_sphere(queries, dim, 2)),
        _ => blocks_like(n, queries, dim, 3),
    }
}

fn params(a: &Args, exact_below: usize) -> IndexParams {
    IndexParams {
        max_connections: a.m,
        ef_construction: a.ef_construction,
        ef_search: 64,
        exact_below,
        build_threads: a.threads,
        backend: a.backend,
    }
}

/// Resident memory of this process in bytes (`VmRSS` of /proc/self/status).
fn resident_bytes() -> u64 {
    std::fs::read_to_string("/proc/self/status")
        .ok()
        .and_then(|s| {
            s.lines()
                .find_map(|l| l.strip_prefix("VmRSS:"))
                .and_then(|v| v.trim().trim_end_matches("kB").trim().parse::<u64>().ok())
        })
        .map_or(0, |kib| kib * 1024)
}

fn rows(base: &[f32], dim: usize) -> Vec<(RowId, Vec<f32>)> {
    base.chunks(dim)
        .enumerate()
        .map(|(i, v)| (i as RowId, v.to_vec()))
        .collect()
}

fn emit(line: serde_json::Value) {
    println!("{line}");
}

fn run_size(a: &Args, kind: &str, n: usize) -> std::io::Result<()> {
    let dim = a.dim;
    let (base, queries) = data(kind, n, a.queries, dim);
    let stem = a.out.join(format!("{kind}-{n}"));
    std::fs::create_dir_all(&stem)?;
    write_npy(&stem.join("base.npy"), "<f4", (n, dim), &f32_bytes(&base))?;
    write_npy(
        &stem.join("queries.npy"),
        "<f4",
        (a.queries, dim),
        &f32_bytes(&queries),
    )?;

    let index_dir = stem.join("befit-index");
    let _ = std::fs::remove_dir_all(&index_dir);
    let source = rows(&base, dim);
    let resident_before = resident_bytes();
    let t = Instant::now();
    let (index, _) = VectorIndex::open(&index_dir, DIGEST, dim, params(a, 0), &source)
        .map_err(std::io::Error::other)?;
    let build = t.elapsed().as_secs_f64();
    // The index's whole footprint: the graph and the exact rows beside it.
    let index_bytes = resident_bytes().saturating_sub(resident_before);
    let memory = index.memory();
    drop(source);
    if a.flat {
        // The index made its copy at the end of the build (counted above);
        // a second freeze times it alone and sizes it.
        let resident_before = resident_bytes();
        let t = Instant::now();
        let copy = index.freeze().map_err(std::io::Error::other)?;
        let freeze = t.elapsed().as_secs_f64();
        let links = copy.link_report();
        emit(
            serde_json::json!({"side": "befit", "copy": "flat", "kind": kind, "n": n, "what": "build",
            "freeze_seconds": freeze, "dim": dim, "m": a.m,
            "library_links": links.library, "reverse_links": links.reverse,
            "stranded": links.stranded, "rejoined": links.rejoined,
            "bytes_per_caption": copy.bytes() as f64 / n as f64,
            "resident_growth_per_caption": resident_bytes().saturating_sub(resident_before) as f64 / n as f64}),
        );
    }

    // Exact scan: ground truth and its own speed (one thread).
    let t = Instant::now();
    let mut exact_cos = Vec::new();
    let mut exact_ids = Vec::new();
    for q in queries.chunks(dim) {
        let hits = index.exact(q, a.k, None).map_err(std::io::Error::other)?;
        exact_cos.push(hits.iter().map(|h| h.cosine).collect::<Vec<f32>>());
        exact_ids.push(hits.iter().map(|h| h.id as i64).collect::<Vec<i64>>());
    }
    let exact_secs = t.elapsed().as_secs_f64();
    let flat: Vec<f32> = exact_cos.iter().flatten().copied().collect();
    write_npy(
        &stem.join("exact_cos.npy"),
        "<f4",
        (a.queries, a.k),
        &f32_bytes(&flat),
    )?;
    let ids: Vec<u8> = exact_ids
        .iter()
        .flatten()
        .flat_map(|x| x.to_le_bytes())
        .collect();
    write_npy(&stem.join("exact_ids.npy"), "<i8", (a.queries, a.k), &ids)?;
    emit(
        serde_json::json!({"side": "befit", "kind": kind, "n": n, "what": "exact",
        "qps": a.queries as f64 / exact_secs, "recall": 1.0}),
    );
    emit(
        serde_json::json!({"side": "befit", "kind": kind, "n": n, "what": "build",
        "seconds": build, "threads": a.threads, "m": a.m, "ef_construction": a.ef_construction,
        "backend": a.backend, "dim": dim, "bytes_per_caption": index_bytes as f64 / n as f64,
        "exact_rows_bytes_per_caption": (dim * 4) as f64,
        "parts_bytes_per_caption": {
            "exact_rows": memory.exact_rows as f64 / n as f64,
            "library_vectors": memory.library.map(|l| l.vectors as f64 / n as f64),
            "library_graph": memory.library.map(|l| l.graph as f64 / n as f64),
            "copy": memory.copy as f64 / n as f64,
        }}),
    );

    // With `--query-threads T` above 1: the default way (through the copy
    // when the backend makes one) with T threads sharing the queries.
    if a.query_threads > 1 {
        for &ef in &a.ef_search {
            let search = graph_search(a.k, ef);
            let (qps, recall) = timed(&queries, dim, &exact_cos, a.k, a.query_threads, |q| {
                Ok(index.search(q, &search)?.hits)
            })?;
            emit(
                serde_json::json!({"side": "befit", "kind": kind, "n": n, "what": "search_threads",
                "query_threads": a.query_threads, "ef_search": ef, "qps": qps, "recall": recall}),
            );
        }
    }

    // With `--flat`: first the index's own searches (through its flat copy)
    // as the `usearch-flat` rows, then the copy is set aside and usearch's
    // own search gives the `usearch` rows.
    let passes: &[bool] = if a.flat { &[true, false] } else { &[false] };
    for &through_copy in passes {
        if a.flat && !through_copy {
            index.set_copy_aside();
        }
        for &ef in &a.ef_search {
            let search = graph_search(a.k, ef);
            let (qps, recall) = timed(&queries, dim, &exact_cos, a.k, 1, |q| {
                Ok(index.search(q, &search)?.hits)
            })?;
            let mut row = serde_json::json!({"side": "befit", "kind": kind, "n": n, "what": "search",
                "ef_search": ef, "qps": qps, "recall": recall});
            if through_copy {
                row["copy"] = "flat".into();
            }
            emit(row);
        }
    }

    if a.dump {
        let t = Instant::now();
        index.dump().map_err(std::io::Error::other)?;
        let dump_secs = t.elapsed().as_secs_f64();
        drop(index);
        let source = rows(&base, dim);
        let t = Instant::now();
        let (_, report) = VectorIndex::open(&index_dir, DIGEST, dim, params(a, 0), &source)
            .map_err(std::io::Error::other)?;
        emit(
            serde_json::json!({"side": "befit", "kind": kind, "n": n, "what": "dump",
            "dump_seconds": dump_secs, "load_seconds": t.elapsed().as_secs_f64(), "origin": report.origin}),
        );
    }
    let _ = std::fs::remove_dir_all(&index_dir);
    Ok(())
}

/// An unfiltered search through the graph (never the scan) at breadth `ef`.
fn graph_search(k: usize, ef: usize) -> Search<'static> {
    Search {
        k,
        ef_search: Some(ef),
        mode: SearchMode::Index,
        only: None,
    }
}

/// Queries per second of `search` over `queries` with `threads` threads,
/// each searching its share of the queries (consecutive runs of them), and
/// its recall@k against the exact cosines (answers kept in query order).
fn timed(
    queries: &[f32],
    dim: usize,
    exact_cos: &[Vec<f32>],
    k: usize,
    threads: usize,
    search: impl Fn(&[f32]) -> Result<Vec<Neighbour>, IndexError> + Sync,
) -> std::io::Result<(f64, f64)> {
    let count = queries.len() / dim;
    let per_thread = count.div_ceil(threads).max(1);
    let t = Instant::now();
    let parts: Vec<Result<Vec<Vec<f32>>, IndexError>> = std::thread::scope(|scope| {
        let search = &search;
        let handles: Vec<_> = queries
            .chunks(per_thread * dim)
            .map(|share| {
                scope.spawn(move || {
                    share
                        .chunks(dim)
                        .map(|q| Ok(search(q)?.iter().map(|h| h.cosine).collect()))
                        .collect()
                })
            })
            .collect();
        handles
            .into_iter()
            .map(|h| h.join().expect("a query thread panicked"))
            .collect()
    });
    let secs = t.elapsed().as_secs_f64();
    let mut approx = Vec::with_capacity(count);
    for part in parts {
        approx.extend(part.map_err(std::io::Error::other)?);
    }
    Ok((
        approx.len() as f64 / secs,
        mean_recall(exact_cos, &approx, k),
    ))
}

/// Exact scan against the graph at the default breadth, bank sizes up to
/// 100k: where the exact scan stops being the faster answer.
fn crossover(a: &Args) -> std::io::Result<()> {
    let dim = a.dim;
    for n in [
        250, 500, 1_000, 2_000, 5_000, 10_000, 20_000, 30_000, 50_000, 100_000,
    ] {
        let (base, queries) = blocks_like(n, a.queries, dim, 9);
        let index =
            VectorIndex::in_memory(DIGEST, dim, params(a, 0)).map_err(std::io::Error::other)?;
        index
            .insert(&rows(&base, dim))
            .map_err(std::io::Error::other)?;
        let mut qps = Vec::new();
        for mode in [SearchMode::Exact, SearchMode::Index] {
            let search = Search {
                k: a.k,
                ef_search: None,
                mode,
                only: None,
            };
            let t = Instant::now();
            for q in queries.chunks(dim) {
                index.search(q, &search).map_err(std::io::Error::other)?;
            }
            qps.push(a.queries as f64 / t.elapsed().as_secs_f64());
        }
        emit(
            serde_json::json!({"what": "crossover", "n": n, "exact_qps": qps[0], "index_qps": qps[1],
            "ef_search": befit::bank::index::DEFAULT_EF_SEARCH, "backend": a.backend, "dim": dim}),
        );
    }
    Ok(())
}

/// Exact search of `--queries` queries as one batch and of `--singles`
/// queries one at a time, over `--sizes`' first size at each of `--dims`.
/// Writes the bank, the queries and the batch's answers as .npy files under
/// `<out>/exact-<n>x<dim>` so `exact_numpy.py` times numpy on the same data
/// and checks its answers against these.
fn batched(a: &Args) -> std::io::Result<()> {
    let n = a.sizes.first().copied().unwrap_or(100_000);
    for &dim in &a.dims {
        let bank = uniform_sphere(n, dim, 1);
        let queries = uniform_sphere(a.queries, dim, 2);
        let mut rows = ExactRows::new(dim);
        rows.reserve(n);
        for (i, v) in bank.chunks(dim).enumerate() {
            rows.push(i as RowId, v);
        }
        // One untimed pass so page faults and lazy initialisation are not timed.
        rows.search_many(&queries[..dim * a.queries.min(8)], a.k, None);
        let started = Instant::now();
        let answers = rows.search_many(&queries, a.k, None);
        let batch_seconds = started.elapsed().as_secs_f64();
        let singles = a.singles.min(a.queries);
        let started = Instant::now();
        let mut agree = 0;
        for (q, batch_answer) in queries.chunks(dim).take(singles).zip(&answers) {
            agree += usize::from(&rows.search(q, a.k, None) == batch_answer);
        }
        let single_seconds = started.elapsed().as_secs_f64() / singles.max(1) as f64;
        let dir = a.out.join(format!("exact-{n}x{dim}"));
        std::fs::create_dir_all(&dir)?;
        write_npy(&dir.join("bank.npy"), "<f4", (n, dim), &f32_bytes(&bank))?;
        write_npy(
            &dir.join("queries.npy"),
            "<f4",
            (a.queries, dim),
            &f32_bytes(&queries),
        )?;
        let ids: Vec<u8> = answers
            .iter()
            .flat_map(|hits| hits.iter().map(|h| h.id as i64))
            .flat_map(i64::to_le_bytes)
            .collect();
        write_npy(&dir.join("befit_ids.npy"), "<i8", (a.queries, a.k), &ids)?;
        emit(serde_json::json!({
            "side": "befit", "what": "exact", "n": n, "dim": dim, "k": a.k,
            "queries": a.queries, "batch_seconds": batch_seconds,
            "single_seconds": single_seconds, "singles": singles,
            "single_equals_batch": agree, "dir": dir,
        }));
    }
    Ok(())
}

/// A row's membership of a tag covering `share` of the bank: a seeded hash
/// of its id (splitmix64's finaliser), so membership has nothing to do with
/// where the row sits among the synthetic clusters.
fn tagged(id: RowId, share: f64) -> bool {
    let mut z = id.wrapping_add(0x9e37_79b9_7f4a_7c15);
    z = (z ^ (z >> 30)).wrapping_mul(0xbf58_476d_1ce4_e5b9);
    z = (z ^ (z >> 27)).wrapping_mul(0x94d0_49bb_1331_11eb);
    z ^= z >> 31;
    (z as f64 / u64::MAX as f64) < share
}

/// Tag-filtered search over a blocks-like bank of `--sizes`' first size at
/// `--dim`, the graph at the default breadth: for tags covering 50% down to
/// 0.2% of the bank, the filtered graph walk and over-fetching each report
/// queries per second, recall@k against the exact scan of the tag's rows,
/// how many answers fell back to that scan and how many had fewer than k
/// hits; the exact scan of the tag's rows is timed beside them.
fn filtered(a: &Args) -> std::io::Result<()> {
    let n = a.sizes.first().copied().unwrap_or(100_000);
    let dim = a.dim;
    let (base, queries) = blocks_like(n, a.queries, dim, 3);
    let index = VectorIndex::in_memory(DIGEST, dim, params(a, 0)).map_err(std::io::Error::other)?;
    let t = Instant::now();
    index
        .insert(&rows(&base, dim))
        .map_err(std::io::Error::other)?;
    emit(
        serde_json::json!({"what": "filtered-build", "n": n, "dim": dim,
        "seconds": t.elapsed().as_secs_f64()}),
    );
    for share in [0.5, 0.2, 0.1, 0.05, 0.02, 0.01, 0.002] {
        let only: std::collections::HashSet<RowId> =
            (0..n as RowId).filter(|&id| tagged(id, share)).collect();
        let t = Instant::now();
        let mut exact = Vec::with_capacity(a.queries);
        for q in queries.chunks(dim) {
            let hits = index
                .exact(q, a.k, Some(&only))
                .map_err(std::io::Error::other)?;
            exact.push(hits.iter().map(|h| h.cosine).collect::<Vec<f32>>());
        }
        let exact_qps = a.queries as f64 / t.elapsed().as_secs_f64();
        let search = Search {
            k: a.k,
            ef_search: Some(DEFAULT_EF_SEARCH),
            mode: SearchMode::Index,
            only: Some(&only),
        };
        for walk in [FilterWalk::Within, FilterWalk::OverFetch] {
            let (mut fell_back, mut short) = (0, 0);
            let mut got = Vec::with_capacity(a.queries);
            let t = Instant::now();
            for q in queries.chunks(dim) {
                let answer = index
                    .search_walking(q, &search, walk)
                    .map_err(std::io::Error::other)?;
                fell_back += usize::from(answer.answered == Answered::Exact);
                short += usize::from(answer.hits.len() < a.k);
                got.push(answer.hits.iter().map(|h| h.cosine).collect::<Vec<f32>>());
            }
            let qps = a.queries as f64 / t.elapsed().as_secs_f64();
            emit(
                serde_json::json!({"what": "filtered", "n": n, "dim": dim, "share": share,
                "tagged": only.len(), "walk": walk, "qps": qps, "exact_qps": exact_qps,
                "recall": mean_recall(&exact, &got, a.k), "fell_back": fell_back,
                "short": short, "queries": a.queries, "ef_search": DEFAULT_EF_SEARCH}),
            );
        }
    }
    Ok(())
}

fn main() -> std::io::Result<()> {
    let a = parse_args();
    std::fs::create_dir_all(&a.out)?;
    if a.crossover {
        return crossover(&a);
    }
    if a.batched {
        return batched(&a);
    }
    if a.filtered {
        return filtered(&a);
    }
    for n in a.sizes.clone() {
        for kind in a.kinds.clone() {
            run_size(&a, &kind, n)?;
        }
    }
    Ok(())
}
