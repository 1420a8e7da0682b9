//! befit: how well does a caption fit an image, asked by a training loop.
//!
//! The data's way through the crate, one module per stage:
//!
//! - [`cli`]: command-line arguments parsed and validated into typed settings;
//!   the only place that reads environment variables.
//! - [`runtime`]: finds and loads the ONNX Runtime library once per process.
//! - [`bundle`]: a model bundle on disk (`bundle.toml`, ONNX graphs, tokenizer),
//!   parsed, checked against the graphs and digested.
//! - [`intake`]: request bytes to encoder inputs: image decode, orientation,
//!   resize and normalisation; caption tokenisation; image paths under a root.
//! - [`batching`]: coalesces concurrent encode jobs into encoder batches on
//!   worker threads, replying to each job through its own channel.
//! - [`encoders`]: ONNX sessions for the image and text towers, and the engine
//!   that joins intake, batching and caches into "give me vectors".
//! - [`vectors`]: the shared-space math: normalisation, cosine similarity.
//! - [`store`]: the embedded SQLite store of registered images and their
//!   embeddings, with the in-memory layers in front.
//! - [`scoring`]: reward scales, baselines and advantages, and the guards.
//! - [`runs`]: the run watch: per run and step aggregates of the captions a
//!   training run is rewarded for, with warnings and gauges.
//! - [`bank`]: the caption bank and its HNSW index for nearest-caption search.
//! - [`probe`]: labelled probe sets (JSON Lines) for calibration and drift.
//! - [`stats`]: calibration and drift statistics, and their HTML report.
//! - [`metrics`]: Prometheus counters, gauges and histograms every stage reports to.
//! - [`service`]: the service as a library: data folder and its lock, start-up,
//!   reward maps, background dumps; what the server and the tests build on.
//! - [`server`]: the HTTP layer: routes that parse, check, call the domain and
//!   shape the answer; the one error table.

pub mod bank;
pub mod batching;
pub mod bundle;
pub mod cli;
pub mod encoders;
pub mod intake;
pub mod metrics;
pub mod probe;
pub mod runs;
pub mod runtime;
pub mod scoring;
pub mod server;
pub mod service;
pub mod stats;
pub mod store;
pub mod vectors;
