//! `RunBacktest`: validate the specification and its budget before any work,
//! then stream progress and the result of the run on the blocking pool.

use std::sync::atomic::{AtomicU64, Ordering};
use std::time::Duration;

use tonic::{Request, Response, Status};

use super::WeightsApi;
use super::runner::{Call, CancelOnDrop, Deadline};
use super::status::ServiceError;
use crate::convert::{backtest_request_into_parts, backtest_result_to_proto};
use crate::evaluate::{self, Progress};
use crate::proto;
use crate::proto::run_backtest_response::Event;

/// How long a finished backtest waits for its client to take the result.
const RESULT_HANDOFF: Duration = Duration::from_secs(60);

type Message = Result<proto::RunBacktestResponse, Status>;

/// The response stream of `RunBacktest`: progress messages, then the result.
/// Dropping it (the client cancelled) stops the computation.
#[derive(Debug)]
pub struct BacktestStream {
    rx: tokio::sync::mpsc::Receiver<Message>,
    _cancel: CancelOnDrop,
}

impl tonic::codegen::tokio_stream::Stream for BacktestStream {
    type Item = Message;

    fn poll_next(
        mut self: std::pin::Pin<&mut Self>,
        cx: &mut std::task::Context<'_>,
    ) -> std::task::Poll<Option<Self::Item>> {
        self.rx.poll_recv(cx)
    }
}

impl WeightsApi {
    pub(super) async fn handle_backtest(
        &self,
        request: Request<proto::RunBacktestRequest>,
    ) -> Result<Response<BacktestStream>, Status> {
        let (call, req) = self.begin_call("RunBacktest", request);
        match self.start_backtest(req, call.clone()) {
            Ok(stream) => Ok(Response::new(stream)),
            Err(e) => Err(call.fail(&e)),
        }
    }

    /// Admits a backtest, checks its specification and budget, and starts it;
    /// the returned stream yields progress and then the result.
    fn start_backtest(&self, req: proto::RunBacktestRequest, call: Call) -> Result<BacktestStream, ServiceError> {
        let admitted = self.admit()?;
        self.check_size(req.returns.as_ref(), req.factor_names.len())?;
        let (panel, proto_settings, spec, request_id) = backtest_request_into_parts(req);
        // Every request within the size limits is recorded, refused ones included.
        self.shared.metrics.problem_size(panel.rows, panel.cols);
        let settings = self.settings(&proto_settings)?;
        let spec = spec.check(&panel, &settings)?;
        // The stage's largest window: the whole history when expanding.
        let largest = if spec.expanding { panel.rows } else { spec.window };
        self.check_stage_size(&settings, largest, panel.cols)?;
        let budget = spec.budget();
        self.check_budget(budget)?;
        let deadline = Deadline::new(call.timeout, self.shared.config.raw.server.backtest_timeout_ms);
        let (stop, cancel) = deadline.stop();
        let (tx, rx) = tokio::sync::mpsc::channel::<Message>(32);
        let api = self.clone();
        let progress_tx = tx.clone();
        let id = request_id.clone();
        let invocation = format!("RunBacktest request {request_id:?}");
        let call = call.within_windows();
        tokio::spawn(async move {
            let work = move || {
                let last = AtomicU64::new(u64::MAX);
                let progress = |p: Progress| {
                    let pct = (100 * p.done / p.total.max(1)) as u64;
                    if last.swap(pct, Ordering::Relaxed) != pct {
                        let event = Event::Progress(proto::BacktestProgress {
                            fits_done: p.done as u64,
                            fits_total: p.total as u64,
                        });
                        // Progress is best effort: a slow reader loses updates, never stalls the work.
                        let _ = progress_tx
                            .try_send(Ok(proto::RunBacktestResponse { event: Some(event), request_id: id.clone() }));
                    }
                };
                let mut r = evaluate::run(&panel, &settings, &spec, &progress, &stop)?;
                r.provenance.with_origin(
                    &settings,
                    evaluate::provenance::Origin {
                        invocation: &invocation,
                        input: "RunBacktest request",
                        input_bytes: None,
                        settings_source: "the request's settings over the server's defaults",
                    },
                );
                Ok(r)
            };
            let outcome = api.run_blocking("RunBacktest", &request_id, &deadline, work).await.map(|r| {
                let event = Event::Result(backtest_result_to_proto(&r, &request_id));
                proto::RunBacktestResponse { event: Some(event), request_id: request_id.clone() }
            });
            let send = match outcome {
                Ok(r) => {
                    call.served(&format!("refits={} fits={}", budget.refits, budget.fits));
                    Ok(r)
                }
                Err(e) => Err(call.fail(&e)),
            };
            // The work is done: a reader that is slow to take the result must not hold an
            // admission slot, and one that never takes it must not hold the result forever.
            drop(admitted);
            if tokio::time::timeout(RESULT_HANDOFF, tx.send(send)).await.is_err() {
                tracing::warn!(
                    target: "keelson::request",
                    method = "RunBacktest",
                    request_id = %request_id,
                    "the client did not read the backtest result within {} s; dropped",
                    RESULT_HANDOFF.as_secs()
                );
            }
        });
        Ok(BacktestStream { rx, _cancel: cancel })
    }
}
