//! `HistoryService`: stored readings page by page, buckets, a channel's
//! state now, its cycles.

use super::BoxStream;
use super::convert::{self, stored_to_pb};
use super::status::invalid;
use crate::estimator;
use crate::ingest::{ChannelRuntime, Hub};
use crate::pb;
use crate::store::{self, RunRow};
use std::collections::HashMap;
use std::sync::{Arc, Mutex};
use tokio::sync::{mpsc, oneshot};
use tokio_stream::wrappers::ReceiverStream;
use tonic::{Request, Response, Status};

/// Buckets one QueryBuckets call answers at most.
pub const MAX_BUCKETS: u32 = 100_000;

/// The refusal of a width that gives more than [`MAX_BUCKETS`] buckets.
fn too_many_buckets(width_ns: i64) -> Status {
    invalid(
        "bucket_width_ns",
        width_ns,
        &format!(
            "gives more than {MAX_BUCKETS} buckets over the window; widen it or narrow the window"
        ),
    )
}

/// History queries (QueryReadings producing pages, QueryBuckets) at
/// once; more wait their turn.
pub const MAX_CONCURRENT_QUERIES: usize = 32;

/// `HistoryService`: stored readings, buckets, a channel's state and its cycles.
pub struct HistoryApi {
    pub(super) hub: Arc<Hub>,
    pub(super) max_query_rows: u32,
    /// QueryReadings responses being produced at once, server-wide: with
    /// each holding at most a few pages, this bounds query memory.
    queries: Arc<tokio::sync::Semaphore>,
}

impl HistoryApi {
    /// Answers from `hub`'s store; one QueryReadings call returns at most
    /// `max_query_rows` rows.
    pub fn new(hub: Arc<Hub>, max_query_rows: u32) -> HistoryApi {
        HistoryApi {
            hub,
            max_query_rows,
            queries: Arc::new(tokio::sync::Semaphore::new(MAX_CONCURRENT_QUERIES)),
        }
    }

    async fn runs_of(&self, channel_key: i64) -> Result<HashMap<i64, RunRow>, Status> {
        Ok(store::get_runs(&self.hub.store().reader, channel_key)
            .await?
            .into_iter()
            .map(|r| (r.run_id, r))
            .collect())
    }

    /// A place among the history queries running at once (QueryReadings
    /// and QueryBuckets, over gRPC and the JSON API alike).
    async fn query_slot(&self) -> Result<tokio::sync::OwnedSemaphorePermit, Status> {
        tokio::time::timeout(QUERY_WAIT, self.queries.clone().acquire_owned())
            .await
            .map_err(|_| {
                Status::resource_exhausted(format!(
                    "{MAX_CONCURRENT_QUERIES} history queries are running; retry shortly"
                ))
            })?
            .map_err(|_| Status::unavailable("the server is shutting down"))
    }

    fn key_of(&self, channel_id: &str) -> Result<(Arc<Mutex<ChannelRuntime>>, i64), Status> {
        let rt = self.hub.channel(channel_id)?;
        let key = rt.lock().expect("channel state poisoned").key;
        Ok((rt, key))
    }
}

/// Readings per read transaction of a QueryReadings call: each chunk is
/// decoded once per store page, and the page is cut into messages.
const STORE_PAGE_ROWS: u32 = 8_192;
/// Rows per message in READING_LAYOUT_ROWS.
const QUERY_PAGE_ROWS: usize = 2_000;
/// How long a query waits for a free slot before it is refused.
const QUERY_WAIT: std::time::Duration = std::time::Duration::from_secs(10);
/// How long a client may leave a page unread before its query is ended
/// (freeing its slot and memory).
const QUERY_SEND_TIMEOUT: std::time::Duration = std::time::Duration::from_secs(30);

/// The range one QueryReadings call reads, page by page.
struct QueryPage {
    reader: store::Pool,
    channel_key: i64,
    start_ns: i64,
    end_ns: i64,
}

/// Store pages on their way from the reading task to the converting one.
type StorePages = mpsc::Receiver<Result<Vec<store::ReadingRow>, store::StoreError>>;

impl QueryPage {
    /// Answers the query in two tasks, so that decoding the next store
    /// page overlaps converting this one (and prost's encoding of the
    /// message before, on the connection's task): about one store page
    /// in flight between them.
    async fn stream_to(
        self,
        tx: mpsc::Sender<Result<pb::QueryReadingsResponse, Status>>,
        ending: oneshot::Sender<Status>,
        limit: u32,
        layout: pb::ReadingLayout,
        runs: &HashMap<i64, RunRow>,
    ) {
        let (pages_tx, pages) = mpsc::channel(1);
        let reading = tokio::spawn(self.read_into(pages_tx, limit));
        if let Err(status) = send_pages(pages, &tx, layout, runs).await {
            // Delivered after what the client has not read yet: a cut
            // answer never ends with OK.
            let _ = ending.send(status);
        }
        // The client left or a send timed out: stop reading the store.
        reading.abort();
    }

    /// Reads store pages in (time, seq) order until `limit` readings.
    async fn read_into(
        self,
        pages: mpsc::Sender<Result<Vec<store::ReadingRow>, store::StoreError>>,
        limit: u32,
    ) {
        let mut after = (self.start_ns, -1i64);
        let mut left = limit;
        while left > 0 {
            let want = left.min(STORE_PAGE_ROWS);
            let rows = store::query_readings_page(
                &self.reader,
                self.channel_key,
                self.start_ns,
                self.end_ns,
                after,
                want,
            )
            .await;
            let (full, rows) = match rows {
                Ok(rows) => (rows.len() as u32 == want, rows),
                Err(e) => {
                    let _ = pages.send(Err(e)).await;
                    return;
                }
            };
            let Some(last) = rows.last() else { return };
            after = (last.time_ns, last.seq as i64);
            left -= rows.len() as u32;
            if pages.send(Ok(rows)).await.is_err() || !full {
                return;
            }
        }
    }
}

/// Converts store pages to messages of `layout` and sends them; ends at
/// the last page, when the client has gone, or with the status the answer
/// must end with (a store error, a client that stopped reading).
async fn send_pages(
    mut pages: StorePages,
    tx: &mpsc::Sender<Result<pb::QueryReadingsResponse, Status>>,
    layout: pb::ReadingLayout,
    runs: &HashMap<i64, RunRow>,
) -> Result<(), Status> {
    while let Some(page) = pages.recv().await {
        let rows = page?;
        let messages: Vec<pb::QueryReadingsResponse> = match layout {
            pb::ReadingLayout::Columns => vec![pb::QueryReadingsResponse {
                readings: Vec::new(),
                columns: Some(convert::columns_of(&rows)),
            }],
            _ => rows
                .chunks(QUERY_PAGE_ROWS)
                .map(|part| pb::QueryReadingsResponse {
                    readings: part
                        .iter()
                        .map(|r| stored_to_pb(r, runs.get(&r.run_id)))
                        .collect(),
                    columns: None,
                })
                .collect(),
        };
        drop(rows);
        for message in messages {
            match tokio::time::timeout(QUERY_SEND_TIMEOUT, tx.send(Ok(message))).await {
                Ok(Ok(())) => {}
                // The client has gone: nobody to tell.
                Ok(Err(_)) => return Ok(()),
                Err(_) => {
                    return Err(Status::deadline_exceeded(format!(
                        "the client read nothing for {} s; query ended to free its memory (the answer is cut)",
                        QUERY_SEND_TIMEOUT.as_secs()
                    )));
                }
            }
        }
    }
    Ok(())
}

/// Messages as the producing task sends them, then the status it ended
/// with, if it left one.
struct Ending<T> {
    messages: ReceiverStream<Result<T, Status>>,
    end: Option<oneshot::Receiver<Status>>,
}

impl<T> tokio_stream::Stream for Ending<T> {
    type Item = Result<T, Status>;

    fn poll_next(
        mut self: std::pin::Pin<&mut Self>,
        cx: &mut std::task::Context<'_>,
    ) -> std::task::Poll<Option<Self::Item>> {
        use std::future::Future;
        use std::task::Poll;
        if let Some(item) = std::task::ready!(std::pin::Pin::new(&mut self.messages).poll_next(cx))
        {
            return Poll::Ready(Some(item));
        }
        let Some(end) = self.end.as_mut() else {
            return Poll::Ready(None);
        };
        let ended = std::task::ready!(std::pin::Pin::new(end).poll(cx));
        self.end = None;
        Poll::Ready(ended.ok().map(Err))
    }
}
const DEFAULT_QUERY_LIMIT: u32 = 100_000;

/// A query window's end: 0 means open-ended; otherwise after the start.
fn window_end(start_unix_ns: i64, end_unix_ns: i64) -> Result<i64, Status> {
    let end = if end_unix_ns == 0 {
        i64::MAX
    } else {
        end_unix_ns
    };
    if end <= start_unix_ns {
        return Err(invalid(
            "end_unix_ns",
            end_unix_ns,
            "must be after start_unix_ns",
        ));
    }
    Ok(end)
}

#[tonic::async_trait]
impl pb::history_service_server::HistoryService for HistoryApi {
    type QueryReadingsStream = BoxStream<pb::QueryReadingsResponse>;

    async fn query_readings(
        &self,
        request: Request<pb::QueryReadingsRequest>,
    ) -> Result<Response<Self::QueryReadingsStream>, Status> {
        let q = request.into_inner();
        let (_, key) = self.key_of(&q.channel_id)?;
        let end = window_end(q.start_unix_ns, q.end_unix_ns)?;
        let limit = if q.limit == 0 {
            DEFAULT_QUERY_LIMIT
        } else {
            q.limit
        }
        .min(self.max_query_rows);
        let permit = self.query_slot().await?;
        let layout = pb::ReadingLayout::try_from(q.layout).map_err(|_| {
            invalid(
                "layout",
                q.layout,
                "must be READING_LAYOUT_ROWS or READING_LAYOUT_COLUMNS",
            )
        })?;
        let runs = self.runs_of(key).await?;
        let page = QueryPage {
            reader: self.hub.store().reader.clone(),
            channel_key: key,
            start_ns: q.start_unix_ns,
            end_ns: end,
        };
        // One message in the channel, a store page's messages being sent
        // and one store page read ahead at most: a client that does not
        // read holds ≈ 3 MB, and only for QUERY_SEND_TIMEOUT.
        let (tx, rx) = mpsc::channel(1);
        let (ending, end) = oneshot::channel();
        tokio::spawn(async move {
            let _permit = permit;
            page.stream_to(tx, ending, limit, layout, &runs).await;
        });
        Ok(Response::new(Box::pin(Ending {
            messages: ReceiverStream::new(rx),
            end: Some(end),
        })))
    }

    async fn query_buckets(
        &self,
        request: Request<pb::QueryBucketsRequest>,
    ) -> Result<Response<pb::QueryBucketsResponse>, Status> {
        let q = request.into_inner();
        let (_, key) = self.key_of(&q.channel_id)?;
        if q.bucket_width_ns <= 0 {
            return Err(invalid(
                "bucket_width_ns",
                q.bucket_width_ns,
                "must be positive",
            ));
        }
        let end = window_end(q.start_unix_ns, q.end_unix_ns)?;
        if (end.saturating_sub(q.start_unix_ns)) / q.bucket_width_ns > i64::from(MAX_BUCKETS)
            && q.end_unix_ns != 0
        {
            return Err(too_many_buckets(q.bucket_width_ns));
        }
        let _permit = self.query_slot().await?;
        // Buckets sit on whole multiples of their width since the epoch, so
        // the same query gives the same buckets whenever it is asked (a
        // dashboard's "last hour" moves its start every second); the first
        // one is whole, starting at or before the asked start.
        // A width no rollup tier tiles is answered on a multiple of the
        // coarsest tier below it, and the response says which.
        let width = store::rollup::answered_width(q.bucket_width_ns);
        let start = q.start_unix_ns.div_euclid(width) * width;
        let reader = &self.hub.store().reader;
        // One more than the bound is asked for, to tell "exactly the
        // bound" from "more": an open-ended window is only counted here.
        let rows = store::query_buckets(reader, key, start, end, width, MAX_BUCKETS + 1).await?;
        if rows.len() > MAX_BUCKETS as usize {
            return Err(too_many_buckets(q.bucket_width_ns));
        }
        let before = store::counts_before(reader, key, start).await?;
        let runs = self.runs_of(key).await?;
        let buckets = convert::buckets_to_pb(&rows, before, start, width, &runs);
        Ok(Response::new(pb::QueryBucketsResponse {
            buckets,
            bucket_width_ns: width,
        }))
    }

    async fn get_channel_state(
        &self,
        request: Request<pb::GetChannelStateRequest>,
    ) -> Result<Response<pb::GetChannelStateResponse>, Status> {
        let q = request.into_inner();
        let (rt, key) = self.key_of(&q.channel_id)?;
        let latest = store::latest_reading(&self.hub.store().reader, key).await?;
        let runs = self.runs_of(key).await?;
        let latest_pb = latest
            .as_ref()
            .map(|r| stored_to_pb(r, runs.get(&r.run_id)));
        let g = rt.lock().expect("channel state poisoned");
        let estimator = convert::estimator_to_pb(&g, latest.as_ref(), latest_pb.as_ref());
        Ok(Response::new(pb::GetChannelStateResponse {
            channel: Some(convert::channel_to_pb(&g.def, g.run_id)),
            latest: latest_pb,
            estimator: Some(estimator),
            last_seen_unix_ns: g.last_time_ns,
        }))
    }

    async fn list_cycles(
        &self,
        request: Request<pb::ListCyclesRequest>,
    ) -> Result<Response<pb::ListCyclesResponse>, Status> {
        let (rt, key) = self.key_of(&request.into_inner().channel_id)?;
        let rows = store::list_cycles(&self.hub.store().reader, key).await?;
        let mut cycles = Vec::with_capacity(rows.len() + 1);
        for (run_id, json) in rows {
            let c: estimator::CycleRecord = serde_json::from_str(&json)
                .map_err(|e| Status::internal(format!("stored cycle: {e}")))?;
            cycles.push(convert::cycle_to_pb(run_id, &c));
        }
        // The cycle still running lives in the channel's state, not the store.
        let g = rt.lock().expect("channel state poisoned");
        if let Some(open) = g.est.cycles.peek(&estimator::Counters::of(&g.est)) {
            cycles.push(convert::cycle_to_pb(g.run_id, &open));
        }
        Ok(Response::new(pb::ListCyclesResponse { cycles }))
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use tokio_stream::StreamExt;

    fn row(seq: u64) -> store::ReadingRow {
        store::ReadingRow {
            channel_key: 1,
            seq,
            run_id: 1,
            time_ns: seq as i64,
            volts: 1.1,
            amps: None,
            temp_c: None,
            cell_volts_used: 1.1,
            soc_model: None,
            soc_fused: None,
            charge_ah: 0.0,
            energy_wh: 0.0,
            flags: 0,
            soc_counted_unclamped: None,
        }
    }

    /// On paused time: a client that reads one message and then nothing
    /// gets what was queued and then DEADLINE_EXCEEDED, never a clean end.
    #[tokio::test(start_paused = true)]
    async fn an_answer_cut_for_an_unread_client_ends_with_deadline_exceeded() {
        let (pages_tx, pages) = mpsc::channel(4);
        for first in [1u64, 5_001] {
            let rows = (first..first + 5_000).map(row).collect();
            pages_tx.send(Ok(rows)).await.unwrap();
        }
        drop(pages_tx);
        let (tx, rx) = mpsc::channel(1);
        let (ending_tx, ending_rx) = oneshot::channel();
        let sender = tokio::spawn(async move {
            if let Err(status) =
                send_pages(pages, &tx, pb::ReadingLayout::Rows, &HashMap::new()).await
            {
                let _ = ending_tx.send(status);
            }
        });
        let mut answer = Ending {
            messages: ReceiverStream::new(rx),
            end: Some(ending_rx),
        };
        let first = answer.next().await.unwrap().unwrap();
        assert_eq!(first.readings.len(), QUERY_PAGE_ROWS);
        // The client stops reading; the paused clock runs to the limit.
        sender.await.unwrap();
        let mut rows = first.readings.len();
        let end = loop {
            match answer.next().await {
                Some(Ok(m)) => rows += m.readings.len(),
                Some(Err(status)) => break status,
                None => panic!("a cut answer ended as if complete after {rows} rows"),
            }
        };
        assert_eq!(end.code(), tonic::Code::DeadlineExceeded, "{end:?}");
        assert!(rows < 10_000, "{rows} rows");
        assert!(answer.next().await.is_none());
    }

    #[tokio::test]
    async fn a_whole_answer_ends_cleanly() {
        let (pages_tx, pages) = mpsc::channel(1);
        pages_tx
            .send(Ok((1..=10).map(row).collect()))
            .await
            .unwrap();
        drop(pages_tx);
        let (tx, rx) = mpsc::channel(8);
        let (ending_tx, ending_rx) = oneshot::channel::<Status>();
        send_pages(pages, &tx, pb::ReadingLayout::Rows, &HashMap::new())
            .await
            .unwrap();
        drop((tx, ending_tx));
        let answer = Ending {
            messages: ReceiverStream::new(rx),
            end: Some(ending_rx),
        };
        let all: Vec<_> = answer.collect().await;
        assert_eq!(all.len(), 1);
        assert_eq!(all[0].as_ref().unwrap().readings.len(), 10);
    }
}
