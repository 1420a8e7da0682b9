//! Request bodies are read in full before a request takes a slot, and new
//! work is refused before its body is read when the encoders already have
//! more than `--max-queue-wait-ms` of work queued.
//!
//! A client that trickles its body must not hold one of the `--max-inflight`
//! slots (nor an encoder job) while it does, so this layer sits outside the
//! concurrency limit: it reads the body within `--body-timeout-secs`, refuses
//! one slower than `--min-body-rate` after [`BODY_RATE_GRACE`], stops at
//! `--max-body-bytes`, and hands the route a body already in memory.

use std::sync::atomic::{AtomicI64, Ordering};
use std::time::{Duration, Instant};

use axum::body::{Body, Bytes};
use axum::extract::{Request, State};
use axum::middleware::Next;
use axum::response::{IntoResponse, Response};
use http_body_util::BodyExt;

use super::error::{ApiError, ErrorCode};
use crate::intake::limits::{Limits, BODY_RATE_GRACE};
use crate::service::Service;

/// How often a stalled body is looked at.
const RATE_CHECK_EVERY: Duration = Duration::from_millis(500);

/// Bodies being read now, server-wide (a gauge on `/metrics`).
static READING: AtomicI64 = AtomicI64::new(0);

/// Counts a body being read while alive.
struct Reading;

impl Reading {
    fn start() -> Reading {
        READING.fetch_add(1, Ordering::Relaxed);
        Reading
    }
}

impl Drop for Reading {
    fn drop(&mut self) {
        READING.fetch_sub(1, Ordering::Relaxed);
    }
}

/// Bodies being read at this moment.
pub fn bodies_reading() -> i64 {
    READING.load(Ordering::Relaxed)
}

/// The middleware: buffers the body, then runs the rest of the stack.
pub async fn read_first(State(state): State<Service>, request: Request, next: Next) -> Response {
    // Admission by queued work, before a byte of the body is read: a request
    // that would only wait behind more than --max-queue-wait-ms of encoding
    // is told at once how long the queue needs to drain.
    if request.method() == axum::http::Method::POST {
        let queued = state.queued_work();
        if queued > state.limits().max_queue_wait {
            return ApiError::queue_full_for(queued).into_response();
        }
    }
    let (parts, body) = request.into_parts();
    let read = read_body(body, state.limits());
    let reading = bodies_reading() as f64;
    state
        .metrics()
        .set("befit_http_bodies_reading", &[], reading + 1.0);
    let read = read.await;
    state
        .metrics()
        .set("befit_http_bodies_reading", &[], bodies_reading() as f64);
    let bytes = match read {
        Ok(bytes) => bytes,
        Err(e) => {
            state.metrics().add(
                "befit_http_bodies_refused_total",
                &[("code", e.code.as_str())],
                1,
            );
            return e.into_response();
        }
    };
    next.run(Request::from_parts(parts, Body::from(bytes)))
        .await
}

/// Reads `body` whole within `limits`' size, deadline and rate.
pub async fn read_body(body: Body, limits: &Limits) -> Result<Bytes, ApiError> {
    let _reading = Reading::start();
    let started = Instant::now();
    let deadline = started + limits.body_timeout;
    let mut body = body;
    let mut buffer: Vec<u8> = Vec::new();
    loop {
        let wait = RATE_CHECK_EVERY.min(deadline.saturating_duration_since(Instant::now()));
        match tokio::time::timeout(wait, body.frame()).await {
            Ok(None) => break,
            Ok(Some(Err(e))) => {
                return Err(ApiError::new(
                    ErrorCode::BadJson,
                    format!("the request body could not be read: {e}"),
                ))
            }
            Ok(Some(Ok(frame))) => {
                if let Ok(data) = frame.into_data() {
                    if buffer.len() + data.len() > limits.max_body_bytes {
                        return Err(ApiError::body_too_large());
                    }
                    buffer.extend_from_slice(&data);
                }
            }
            Err(_) => {}
        }
        let elapsed = started.elapsed();
        if Instant::now() >= deadline {
            return Err(slow_body(format!(
                "the body did not arrive within {} s (--body-timeout-secs)",
                limits.body_timeout.as_secs()
            )));
        }
        if elapsed > BODY_RATE_GRACE
            && (buffer.len() as f64) < limits.min_body_rate as f64 * elapsed.as_secs_f64()
        {
            return Err(slow_body(format!(
                "the body arrived at {:.0} bytes a second, slower than --min-body-rate {}",
                buffer.len() as f64 / elapsed.as_secs_f64(),
                limits.min_body_rate
            )));
        }
    }
    Ok(Bytes::from(buffer))
}

fn slow_body(message: String) -> ApiError {
    ApiError::new(ErrorCode::SlowBody, message)
}

#[cfg(test)]
mod tests {
    use super::*;
    use futures::stream;

    fn trickle(chunks: Vec<&'static [u8]>, every: Duration) -> Body {
        let s = stream::unfold(chunks.into_iter(), move |mut it| async move {
            let chunk = it.next()?;
            tokio::time::sleep(every).await;
            Some((Ok::<_, std::io::Error>(Bytes::from_static(chunk)), it))
        });
        Body::from_stream(s)
    }

    #[tokio::test]
    async fn a_body_over_the_limit_is_413_and_at_the_limit_is_read() {
        let limits = Limits {
            max_body_bytes: 10,
            ..Limits::default()
        };
        let ok = read_body(Body::from(vec![b'x'; 10]), &limits)
            .await
            .unwrap();
        assert_eq!(ok.len(), 10);
        let e = read_body(Body::from(vec![b'x'; 11]), &limits)
            .await
            .unwrap_err();
        assert_eq!(e.code, ErrorCode::BodyTooLarge);
    }

    #[tokio::test]
    async fn a_body_past_its_deadline_is_refused_as_slow() {
        let limits = Limits {
            body_timeout: Duration::from_millis(300),
            ..Limits::default()
        };
        // Four chunks 200 ms apart cannot arrive within 300 ms.
        let body = trickle(vec![b"a", b"b", b"c", b"d"], Duration::from_millis(200));
        let e = read_body(body, &limits).await.unwrap_err();
        assert_eq!(e.code, ErrorCode::SlowBody);
        assert!(e.message.contains("--body-timeout-secs"), "{}", e.message);
    }
}
