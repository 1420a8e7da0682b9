//! The raw command-line surface (clap). Defaults come from the named
//! constants of the modules they configure.

use std::net::SocketAddr;
use std::path::PathBuf;

use clap::{Args, Parser, Subcommand};

use crate::bank::index::IndexBackend;
use crate::batching::{DEFAULT_MAX_BATCH, DEFAULT_MAX_WAIT_MICROS, DEFAULT_QUEUE_DEPTH};
use crate::intake::image_decode::{ImageLimits, DEFAULT_MAX_DECODED_BYTES, DEFAULT_MAX_PIXELS};
use crate::intake::limits::*;
use crate::service::data_dir::DEFAULT_DATA_DIR;
use crate::store::memory::{DEFAULT_CAPTION_CACHE, DEFAULT_IMAGE_CACHE};

/// How well does a caption fit an image? Rewards for training loops.
#[derive(Debug, Parser)]
#[command(name = "befit", version, about)]
pub struct Cli {
    /// Log as JSON lines instead of text.
    #[arg(long, global = true, env = "BEFIT_LOG_JSON")]
    pub log_json: bool,
    #[command(subcommand)]
    pub command: Command,
}

// Parsed once per process: the size of the largest variant costs nothing.
#[allow(clippy::large_enum_variant)]
#[derive(Debug, Subcommand)]
pub enum Command {
    /// Run the HTTP service.
    Serve(ServeArgs),
    /// Check a bundle against its ONNX graphs and print its identity and digest.
    CheckBundle(CheckBundleArgs),
    /// Rewards of sampled captions offline: JSON Lines of groups in, one JSON line of rewards per group out.
    Score(ScoreArgs),
    /// Calibration of one bundle on a labelled probe set.
    Calibrate(CalibrateArgs),
    /// Drift between two bundle versions on a labelled probe set.
    Drift(DriftArgs),
    /// The caption bank: import captions, query nearest captions.
    #[command(subcommand)]
    Bank(BankCommand),
    /// API keys for `befit serve --keys`.
    #[command(subcommand)]
    Keys(KeysCommand),
    /// Print the HTTP API as an OpenAPI 3.1 document (what `GET /openapi.json` serves).
    Openapi,
}

#[derive(Debug, Subcommand)]
pub enum KeysCommand {
    /// Make a key: prints its token once and appends only the token's hash to the keys file.
    New(KeysNewArgs),
}

#[derive(Debug, Args)]
pub struct KeysNewArgs {
    /// The keys file (`befit serve --keys`); created, readable by its owner only, if missing.
    #[arg(long, value_name = "FILE")]
    pub keys: PathBuf,
    /// What the key may do: scoring, bank-write, statistics or admin; repeatable.
    #[arg(long = "scope", required = true, value_name = "SCOPE")]
    pub scopes: Vec<crate::server::access::Scope>,
    /// The key's name in logs and answers (default: 8 random hex digits).
    #[arg(long, value_name = "ID")]
    pub id: Option<String>,
}

#[derive(Debug, Subcommand)]
pub enum BankCommand {
    /// Embed captions from a JSON Lines file and add them to the bank (resumable).
    Import(BankImportArgs),
    /// The captions nearest an image or a text.
    Query(BankQueryArgs),
    /// Embed, for a bundle, every bank caption it has no vector for (after a retrain).
    EmbedMissing(BankEmbedMissingArgs),
}

/// Which graph library holds the caption bank's index.
#[derive(Debug, Args)]
pub struct BankIndexArgs {
    /// Graph library of the caption bank's index: usearch or hnsw-rs. A dump written by
    /// the other one is not read: the index is rebuilt from the bank at start.
    #[arg(long, value_name = "NAME", default_value_t = IndexBackend::default(),
          value_parser = parse_backend)]
    pub bank_backend: IndexBackend,
}

fn parse_backend(name: &str) -> Result<IndexBackend, String> {
    IndexBackend::from_name(name).ok_or_else(|| {
        let names: Vec<&str> = IndexBackend::ALL.iter().map(|b| b.name()).collect();
        format!("unknown backend {name:?}: give one of {}", names.join(", "))
    })
}

/// What every command that writes the bank's vectors takes.
#[derive(Debug, Args)]
pub struct BankWriteArgs {
    /// Model bundle whose text encoder embeds the captions.
    #[arg(long, value_name = "DIR")]
    pub bundle: PathBuf,
    /// Data folder holding the bank (the one `befit serve --data-dir` uses).
    #[arg(long, value_name = "DIR", default_value = DEFAULT_DATA_DIR)]
    pub data_dir: PathBuf,
    /// Captions embedded and committed together.
    #[arg(long, default_value_t = crate::bank::import::DEFAULT_IMPORT_BATCH)]
    pub batch_size: usize,
    #[command(flatten)]
    pub index: BankIndexArgs,
    #[command(flatten)]
    pub runtime: RuntimeArgs,
    #[command(flatten)]
    pub encoders: EncoderArgs,
}

#[derive(Debug, Args)]
pub struct BankImportArgs {
    /// Captions, one per line: {"text": "...", "tag": "..."} or a JSON string.
    #[arg(long, value_name = "FILE.jsonl")]
    pub from: PathBuf,
    /// Tag for lines without their own.
    #[arg(long)]
    pub tag: Option<String>,
    #[command(flatten)]
    pub write: BankWriteArgs,
}

#[derive(Debug, Args)]
pub struct BankEmbedMissingArgs {
    #[command(flatten)]
    pub write: BankWriteArgs,
}

#[derive(Debug, Args)]
pub struct BankQueryArgs {
    /// Model bundle.
    #[arg(long, value_name = "DIR")]
    pub bundle: PathBuf,
    /// Query with this image file.
    #[arg(long, value_name = "PATH")]
    pub image: Option<PathBuf>,
    /// Query with this caption.
    #[arg(long)]
    pub text: Option<String>,
    /// Captions wanted (-k or --k, as in `drift`).
    #[arg(short, long, default_value_t = 10)]
    pub k: usize,
    /// Only captions with this tag.
    #[arg(long)]
    pub tag: Option<String>,
    /// HNSW search breadth (default: the bank's).
    #[arg(long)]
    pub ef_search: Option<usize>,
    /// Scan every caption instead of the index.
    #[arg(long)]
    pub exact: bool,
    /// Print the answer as JSON.
    #[arg(long)]
    pub json: bool,
    /// Data folder holding the bank.
    #[arg(long, value_name = "DIR", default_value = DEFAULT_DATA_DIR)]
    pub data_dir: PathBuf,
    #[command(flatten)]
    pub index: BankIndexArgs,
    #[command(flatten)]
    pub runtime: RuntimeArgs,
    #[command(flatten)]
    pub encoders: EncoderArgs,
}

/// How cosines become rewards, as `/v1/rewards` takes them.
#[derive(Debug, Clone, Copy, PartialEq, Eq, clap::ValueEnum)]
pub enum ScaleKind {
    Cosine,
    ClipS,
    RefClipS,
    Affine,
}

/// The baseline advantages are taken against.
#[derive(Debug, Clone, Copy, PartialEq, Eq, clap::ValueEnum)]
pub enum BaselineKind {
    None,
    MeanOfOthers,
    Greedy,
}

#[derive(Debug, Args)]
pub struct ScoreArgs {
    /// Model bundle that scores.
    #[arg(long, value_name = "DIR")]
    pub bundle: PathBuf,
    /// Groups, one per line, in the shape of a `/v1/rewards` group:
    /// {"image": {"path": ...} | {"base64": ...}, "captions": [...], "references"?: [...], "greedy"?: "..."}.
    #[arg(long, value_name = "FILE.jsonl")]
    pub input: PathBuf,
    /// Where the rewards go, one JSON line per input line (default: standard output).
    #[arg(long, value_name = "FILE.jsonl")]
    pub output: Option<PathBuf>,
    /// Folder that image paths are relative to (default: the input file's folder).
    #[arg(long, value_name = "DIR")]
    pub image_root: Option<PathBuf>,
    /// Reward scale.
    #[arg(long, value_enum, default_value_t = ScaleKind::Cosine)]
    pub scale: ScaleKind,
    /// Weight w of clip-s and ref-clip-s.
    #[arg(long, default_value_t = crate::scoring::scale::DEFAULT_CLIP_S_WEIGHT)]
    pub weight: f32,
    /// Slope of the affine scale.
    #[arg(long, default_value_t = 1.0)]
    pub affine_a: f32,
    /// Offset of the affine scale.
    #[arg(long, default_value_t = 0.0)]
    pub affine_b: f32,
    /// Baseline of the advantages.
    #[arg(long, value_enum, default_value_t = BaselineKind::None)]
    pub baseline: BaselineKind,
    /// A reward map file (from `befit drift --save-map`) fitted for this bundle.
    #[arg(long, value_name = "FILE")]
    pub remap: Option<PathBuf>,
    /// A guard, as the `guard` object of `/v1/rewards` (JSON text): each sample
    /// then carries its signals and its guarded reward. `nearest_bank` measures
    /// nothing offline (no bank).
    #[arg(long, value_name = "JSON")]
    pub guard: Option<String>,
    /// Write bad lines as {"line", "error"} and go on, instead of stopping at the first.
    #[arg(long)]
    pub skip_bad: bool,
    /// Groups scored together (they share encoder batches).
    #[arg(long, default_value_t = 256)]
    pub chunk: usize,
    #[command(flatten)]
    pub runtime: RuntimeArgs,
    #[command(flatten)]
    pub encoders: EncoderArgs,
}

/// Where ONNX Runtime is.
#[derive(Debug, Args, Clone)]
pub struct RuntimeArgs {
    /// Path of libonnxruntime.so (else ORT_DYLIB_PATH, else .cache/onnxruntime/).
    #[arg(long, value_name = "PATH")]
    pub ort_lib: Option<PathBuf>,
}

/// How encoders run.
#[derive(Debug, Args, Clone)]
pub struct EncoderArgs {
    /// Worker threads (one ONNX session each) per encoder. Default, with
    /// neither this nor --intra-threads: by each encoder's graph size, one
    /// worker per core with 1 thread below 64 MiB, 1 worker with a thread per
    /// core from 64 MiB (measured in BENCHMARKS.md); with --intra-threads
    /// alone: the number of cores.
    #[arg(long)]
    pub workers: Option<usize>,
    /// Threads inside each ONNX Runtime session (default: see --workers; 1
    /// when --workers is given).
    #[arg(long)]
    pub intra_threads: Option<usize>,
    /// Largest encoder batch of captions.
    #[arg(long, default_value_t = DEFAULT_MAX_BATCH)]
    pub max_batch: usize,
    /// Largest encoder batch of images.
    #[arg(long, default_value_t = 32)]
    pub max_image_batch: usize,
    /// Largest image in pixels (width x height), checked from the header.
    #[arg(long, default_value_t = DEFAULT_MAX_PIXELS)]
    pub max_pixels: u64,
    /// Largest image in bytes once decoded (width x height x channels x bytes
    /// per sample), checked from the header.
    #[arg(long, default_value_t = DEFAULT_MAX_DECODED_BYTES)]
    pub max_decoded_bytes: u64,
}

/// How a long-running server queues and caches encoder work (offline
/// commands use the defaults: they have one caller and run to the end).
#[derive(Debug, Args, Clone)]
pub struct ServeEncoderArgs {
    /// Longest time a job waits for a batch to fill, in microseconds.
    #[arg(long, default_value_t = DEFAULT_MAX_WAIT_MICROS)]
    pub max_wait_micros: u64,
    /// Encode jobs that may wait per encoder before requests get 503.
    #[arg(long, default_value_t = DEFAULT_QUEUE_DEPTH)]
    pub queue_depth: usize,
    /// Caption embeddings kept in memory per model (0: none).
    #[arg(long, default_value_t = DEFAULT_CAPTION_CACHE)]
    pub caption_cache: usize,
    /// Image embeddings kept in memory per model (0: none; the store still has them).
    #[arg(long, default_value_t = DEFAULT_IMAGE_CACHE)]
    pub image_cache: usize,
}

impl Default for ServeEncoderArgs {
    fn default() -> Self {
        ServeEncoderArgs {
            max_wait_micros: DEFAULT_MAX_WAIT_MICROS,
            queue_depth: DEFAULT_QUEUE_DEPTH,
            caption_cache: DEFAULT_CAPTION_CACHE,
            image_cache: DEFAULT_IMAGE_CACHE,
        }
    }
}

impl EncoderArgs {
    /// The limits one image decode is held to.
    pub fn image_limits(&self) -> ImageLimits {
        ImageLimits {
            max_pixels: self.max_pixels,
            max_decoded_bytes: self.max_decoded_bytes,
        }
    }
}

/// `befit serve`'s flags. Each is also a key of the `--config` file
/// (`config_file.rs`); a few a container sets also read `BEFIT_*` variables.
#[derive(Debug, Args)]
pub struct ServeArgs {
    /// A TOML file of flag values (keys are the flags' names); flags and
    /// BEFIT_* variables override it.
    #[arg(long, value_name = "FILE.toml", env = "BEFIT_CONFIG")]
    pub config: Option<PathBuf>,
    /// Model bundle folder; repeat for more; the first is the default model (at least one).
    #[arg(long = "bundle", value_name = "DIR")]
    pub bundles: Vec<PathBuf>,
    /// Address to listen on (port 0 picks a free port, printed at start).
    #[arg(long, default_value = "127.0.0.1:7878", env = "BEFIT_LISTEN")]
    pub listen: SocketAddr,
    /// Folder for the image store and the caption bank (created if missing).
    #[arg(long, value_name = "DIR", default_value = DEFAULT_DATA_DIR, env = "BEFIT_DATA_DIR")]
    pub data_dir: PathBuf,
    /// Folder under which requests may name images by relative path.
    #[arg(long, value_name = "DIR", env = "BEFIT_IMAGE_ROOT")]
    pub image_root: Option<PathBuf>,
    #[command(flatten)]
    pub runtime: RuntimeArgs,
    #[command(flatten)]
    pub encoders: EncoderArgs,
    #[command(flatten)]
    pub serving: ServeEncoderArgs,
    /// Largest request body in bytes.
    #[arg(long, default_value_t = DEFAULT_MAX_BODY_BYTES)]
    pub max_body_bytes: usize,
    /// Most groups in one rewards request.
    #[arg(long, default_value_t = DEFAULT_MAX_GROUPS)]
    pub max_groups: usize,
    /// Most captions (samples, references, greedy) in one request.
    #[arg(long, default_value_t = DEFAULT_MAX_CAPTIONS)]
    pub max_captions: usize,
    /// Largest caption in bytes.
    #[arg(long, default_value_t = DEFAULT_MAX_CAPTION_BYTES)]
    pub max_caption_bytes: usize,
    /// Most images in one registration or vectors request.
    #[arg(long, default_value_t = DEFAULT_MAX_IMAGES)]
    pub max_images: usize,
    /// Most rows of a probe set sent to /v1/calibration or /v1/drift.
    #[arg(long, default_value_t = DEFAULT_MAX_PROBE_ROWS)]
    pub max_probe_rows: usize,
    /// Requests served at once; more get 503 with Retry-After.
    #[arg(long, default_value_t = DEFAULT_MAX_INFLIGHT)]
    pub max_inflight: usize,
    /// Wall-clock limit of one request, in seconds.
    #[arg(long, default_value_t = DEFAULT_REQUEST_TIMEOUT_SECS)]
    pub request_timeout_secs: u64,
    /// A reward continuity map (from `befit drift --save-map`) that rewards requests may name
    /// as `remap`: NAME=FILE; repeatable. Maps saved by POST /v1/drift live in the data folder.
    #[arg(long = "map", value_name = "NAME=FILE")]
    pub maps: Vec<String>,
    /// Start even when images.sqlite or bank.sqlite holds fewer items than the
    /// data folder's counts.json recorded (they were emptied or replaced).
    #[arg(long)]
    pub accept_smaller_stores: bool,
    #[command(flatten)]
    pub bank_index: BankIndexArgs,
    #[command(flatten)]
    pub guards: ServeGuardArgs,
    #[command(flatten)]
    pub access: ServeAccessArgs,
}

/// Who may use `befit serve`: keys, the network it trusts, the names it answers to, TLS.
#[derive(Debug, Args)]
pub struct ServeAccessArgs {
    /// API keys file (from `befit keys new`): every route but /healthz, /readyz and the live
    /// page's files then needs `Authorization: Bearer TOKEN` with the route's scope.
    #[arg(long, value_name = "FILE")]
    pub keys: Option<PathBuf>,
    /// Serve a non-loopback --listen address without --keys: every host that can reach it
    /// may then write the bank, save reward maps and read embeddings.
    #[arg(long)]
    pub trust_network: bool,
    /// A name clients reach the server by (its Host header); repeatable. The listen address,
    /// and localhost on a loopback or all-interfaces address, are always accepted.
    #[arg(long = "allow-host", value_name = "NAME")]
    pub allow_hosts: Vec<String>,
    /// Requests a second one key may make (0: no limit); more get 429 with Retry-After.
    #[arg(long, default_value_t = crate::server::access::rate::DEFAULT_KEY_RATE)]
    pub key_rate: u32,
    /// Requests one key may make at once above --key-rate.
    #[arg(long, default_value_t = crate::server::access::rate::DEFAULT_KEY_BURST)]
    pub key_burst: u32,
    /// TLS certificate chain (PEM); with --tls-key, the server speaks HTTPS only.
    #[arg(long, value_name = "FILE.pem")]
    pub tls_cert: Option<PathBuf>,
    /// TLS private key (PEM) of --tls-cert.
    #[arg(long, value_name = "FILE.pem")]
    pub tls_key: Option<PathBuf>,
}

/// What a probe-set command does with bad rows and where its figures go.
#[derive(Debug, Args)]
pub struct ProbeOutputArgs {
    /// Go on without rows that cannot be read or embedded (they are listed as warnings).
    #[arg(long)]
    pub skip_bad: bool,
    /// Print every figure as JSON.
    #[arg(long)]
    pub json: bool,
    /// Write a self-contained HTML report.
    #[arg(long, value_name = "FILE")]
    pub report: Option<PathBuf>,
    /// Write the vectors and figures for the reference cross-check.
    #[arg(long, value_name = "FILE")]
    pub export: Option<PathBuf>,
}

#[derive(Debug, Args)]
pub struct CalibrateArgs {
    /// Model bundle folder.
    #[arg(long, value_name = "DIR")]
    pub bundle: PathBuf,
    /// Probe set, JSON Lines (image paths relative to the file).
    #[arg(long, value_name = "FILE")]
    pub probe: PathBuf,
    /// Hinge margin alpha.
    #[arg(long, default_value_t = crate::stats::hinge::DEFAULT_MARGIN)]
    pub margin: f64,
    /// Images per batch for the batch-averaged hinge losses.
    #[arg(long, default_value_t = crate::stats::hinge::DEFAULT_BATCH_IMAGES)]
    pub batch_images: usize,
    #[command(flatten)]
    pub output: ProbeOutputArgs,
    #[command(flatten)]
    pub runtime: RuntimeArgs,
    #[command(flatten)]
    pub encoders: EncoderArgs,
}

#[derive(Debug, Args)]
pub struct DriftArgs {
    /// The old bundle.
    #[arg(long, value_name = "DIR")]
    pub from: PathBuf,
    /// The new bundle.
    #[arg(long, value_name = "DIR")]
    pub to: PathBuf,
    /// Probe set, JSON Lines.
    #[arg(long, value_name = "FILE")]
    pub probe: PathBuf,
    /// Hinge margin alpha of the compared calibrations.
    #[arg(long, default_value_t = crate::stats::hinge::DEFAULT_MARGIN)]
    pub margin: f64,
    /// Captions per image compared by the neighbour overlap (-k or --k, as in `bank query`).
    #[arg(short, long, default_value_t = crate::stats::drift::DEFAULT_NEIGHBOUR_K)]
    pub k: usize,
    /// Pairs listed as moved most.
    #[arg(long, default_value_t = crate::stats::drift::DEFAULT_MOVED_PAIRS)]
    pub moved: usize,
    #[command(flatten)]
    pub output: ProbeOutputArgs,
    /// Write the fitted new-to-old reward map (monotone unless --affine-map) for `serve --map`.
    #[arg(long, value_name = "FILE")]
    pub save_map: Option<PathBuf>,
    /// Save the affine fit instead of the monotone one.
    #[arg(long)]
    pub affine_map: bool,
    #[command(flatten)]
    pub runtime: RuntimeArgs,
    #[command(flatten)]
    pub encoders: EncoderArgs,
}

#[derive(Debug, Args)]
pub struct CheckBundleArgs {
    /// Model bundle folder.
    #[arg(value_name = "DIR")]
    pub bundle: PathBuf,
    #[command(flatten)]
    pub runtime: RuntimeArgs,
}

/// How `befit serve` protects itself from slow, idle and memory-hungry clients.
#[derive(Debug, Args)]
pub struct ServeGuardArgs {
    /// Bytes of images being decoded at once, server-wide; decodes over it wait briefly, then get 503.
    #[arg(long, default_value_t = crate::intake::decode_budget::DEFAULT_DECODE_BUDGET_BYTES)]
    pub decode_budget_bytes: u64,
    /// Seconds a request body may take to arrive in full (it holds no request slot meanwhile).
    #[arg(long, default_value_t = crate::intake::limits::DEFAULT_BODY_TIMEOUT_SECS)]
    pub body_timeout_secs: u64,
    /// Slowest body a client may send, in bytes a second, once the first seconds have passed.
    #[arg(long, default_value_t = crate::intake::limits::DEFAULT_MIN_BODY_RATE)]
    pub min_body_rate: u64,
    /// Seconds a connection may take to send a request's headers, counted from its
    /// opening or its previous answer: idle and slow-header connections are closed after it.
    #[arg(long, default_value_t = crate::server::listen::DEFAULT_HEADER_TIMEOUT_SECS)]
    pub header_timeout_secs: u64,
    /// Connections open at once; more wait in the kernel's queue. Default: 16384, or the
    /// open-file limit less 256 when that is lower; a value over that limit is refused.
    #[arg(long)]
    pub max_connections: Option<usize>,
    /// Seconds to finish requests in flight at shutdown before closing what is left.
    #[arg(long, default_value_t = crate::server::listen::DEFAULT_DRAIN_SECS)]
    pub drain_secs: u64,
    /// Milliseconds of encoder work already queued past which new work requests get 503
    /// before their body is read (Retry-After: the queue's drain time).
    #[arg(long, default_value_t = crate::intake::limits::DEFAULT_MAX_QUEUE_WAIT_MS)]
    pub max_queue_wait_ms: u64,
}
