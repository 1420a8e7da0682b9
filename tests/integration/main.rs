//! befit's integration tests, one binary: shared set-up in `util`, one module
//! per concern. They need the committed fixtures and the ONNX Runtime library
//! (`make ort`, or ORT_DYLIB_PATH).

mod util;

mod abuse;
mod access;
mod bank;
mod bank_limits;
mod binary;
mod concurrency;
mod contrast;
mod first_run;
mod guards;
mod http_errors;
mod http_rewards;
mod http_statistics;
mod live;
mod parity;
mod runs;
mod seams;
