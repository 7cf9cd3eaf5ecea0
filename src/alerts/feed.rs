//! One alert subscriber: the stored events after its resume point, a
//! marker, then live events as the writer commits them. A subscriber that
//! falls behind is told where to resume and dropped; ingest never waits
//! for one.
// Item docs here are still being written (DEVELOPERS.md, "Documentation").
#![allow(missing_docs)]

use crate::ingest::{Hub, stopped};
use crate::metrics::Slot;
use crate::store::{self, AlertEvent, StoreError};
use std::sync::Arc;
use tokio::sync::{broadcast, mpsc};
use tokio_stream::Stream;
use tokio_stream::wrappers::ReceiverStream;

/// Alert subscribers open at once, server-wide.
pub const MAX_SUBSCRIBERS: u64 = 256;
/// Per-subscriber backlog; past it the subscriber is told to resume.
pub const SUBSCRIBER_BUFFER: usize = 1024;
/// Stored events read per page while replaying.
const REPLAY_PAGE: u32 = 1000;

/// Which events a subscriber wants.
#[derive(Debug, Clone)]
pub struct Filter {
    /// Empty: every channel.
    pub channel_id: String,
    pub min_severity: i64,
}

impl Filter {
    /// Alerts of imported recordings are stored and listed, not pushed.
    fn passes(&self, e: &AlertEvent) -> bool {
        !e.alert.historical
            && (self.channel_id.is_empty() || e.alert.channel_id == self.channel_id)
            && e.alert.severity.code() >= self.min_severity
    }
}

#[derive(Debug)]
pub enum FeedItem {
    Event(Box<AlertEvent>),
    /// Replay done: what follows is live.
    Live {
        resume_after_id: u64,
    },
    /// Events were missed; the feed ends next.
    Overflow {
        resume_after_id: u64,
    },
}

#[derive(Debug, thiserror::Error)]
pub enum FeedEnd {
    #[error(transparent)]
    Store(#[from] StoreError),
    #[error("server shutting down; reconnect with after_id = {resume_after_id}")]
    ShuttingDown { resume_after_id: u64 },
    #[error("subscriber fell behind; reconnect with after_id = {resume_after_id}")]
    FellBehind { resume_after_id: u64 },
}

#[derive(Debug, thiserror::Error)]
#[error("{MAX_SUBSCRIBERS} alert subscriptions are open already; retry later")]
pub struct TooManySubscribers;

type Sender = mpsc::Sender<Result<FeedItem, FeedEnd>>;

/// Starts a subscriber's feed from after event `after_id` (an id beyond
/// the newest means "from now on").
pub fn watch(
    hub: &Arc<Hub>,
    filter: Filter,
    after_id: u64,
) -> Result<impl Stream<Item = Result<FeedItem, FeedEnd>> + use<>, TooManySubscribers> {
    // Subscribe before replaying so nothing committed in between is missed;
    // the replay's last id filters out what the live feed repeats.
    let live = hub.subscribe();
    let slot = hub
        .metrics()
        .take_slot(|m| &m.subscribers, MAX_SUBSCRIBERS)
        .ok_or(TooManySubscribers)?;
    let (tx, rx) = mpsc::channel(SUBSCRIBER_BUFFER);
    let feed = Feed {
        hub: hub.clone(),
        filter,
        tx,
        _slot: slot,
    };
    tokio::spawn(feed.run(live, after_id));
    Ok(ReceiverStream::new(rx))
}

struct Feed {
    hub: Arc<Hub>,
    filter: Filter,
    tx: Sender,
    _slot: Slot,
}

impl Feed {
    async fn run(self, live: broadcast::Receiver<AlertEvent>, after_id: u64) {
        let last = match self.replay(after_id).await {
            Ok(Some(last)) => last,
            Ok(None) => return,
            Err(e) => {
                let _ = self.tx.send(Err(e)).await;
                return;
            }
        };
        let marker = FeedItem::Live {
            resume_after_id: last,
        };
        if self.tx.send(Ok(marker)).await.is_ok() {
            self.follow(live, last).await;
        }
    }

    /// Sends the stored events after `after_id`; the last id seen, or
    /// `None` once the subscriber has gone.
    async fn replay(&self, after_id: u64) -> Result<Option<u64>, FeedEnd> {
        let reader = &self.hub.store().reader;
        let (_, next_event) = store::next_ids(reader).await?;
        let mut last = after_id.min(next_event - 1);
        loop {
            let page = store::events_after(reader, last, REPLAY_PAGE).await?;
            let done = page.len() < REPLAY_PAGE as usize;
            for e in page {
                last = e.event_id;
                if self.filter.passes(&e)
                    && self
                        .tx
                        .send(Ok(FeedItem::Event(Box::new(e))))
                        .await
                        .is_err()
                {
                    return Ok(None);
                }
            }
            if done {
                return Ok(Some(last));
            }
        }
    }

    /// Live events until the subscriber goes, falls behind or the server stops.
    async fn follow(&self, mut live: broadcast::Receiver<AlertEvent>, mut last: u64) {
        let end = loop {
            let received = tokio::select! {
                r = live.recv() => r,
                _ = stopped(self.hub.shutdown_signal()) => break FeedEnd::ShuttingDown { resume_after_id: last },
            };
            let event = match received {
                Ok(e) => e,
                Err(broadcast::error::RecvError::Lagged(_)) => {
                    let overflow = FeedItem::Overflow {
                        resume_after_id: last,
                    };
                    let _ = self.tx.send(Ok(overflow)).await;
                    break FeedEnd::FellBehind {
                        resume_after_id: last,
                    };
                }
                Err(broadcast::error::RecvError::Closed) => {
                    break FeedEnd::ShuttingDown {
                        resume_after_id: last,
                    };
                }
            };
            if event.event_id <= last {
                continue;
            }
            last = event.event_id;
            if !self.filter.passes(&event) {
                continue;
            }
            match self.tx.try_send(Ok(FeedItem::Event(Box::new(event)))) {
                Ok(()) => {}
                Err(mpsc::error::TrySendError::Full(_)) => {
                    break FeedEnd::FellBehind {
                        resume_after_id: last - 1,
                    };
                }
                Err(mpsc::error::TrySendError::Closed(_)) => return,
            }
        };
        let _ = self.tx.send(Err(end)).await;
    }
}
