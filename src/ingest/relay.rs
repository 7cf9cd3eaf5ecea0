//! Several servers on one PostgreSQL database: every server's alert
//! events reach this server's subscribers. The writers NOTIFY at commit;
//! the relay wakes, reads the stored events after the last one it passed
//! on, in id order (ids are taken under a database-wide lock, so they
//! rise in commit order and none is skipped), and publishes them to the
//! hub's subscribers, as the writer does alone on SQLite.

use super::Hub;
use crate::store::{self, lease::EventWaker};
use std::sync::Arc;
use std::time::Duration;

/// Events read per query.
const PAGE: u32 = 500;
/// Longest wait without a notification before the table is read anyway.
const POLL: Duration = Duration::from_millis(500);

/// Relays events until the task is aborted.
pub async fn run(hub: Arc<Hub>, mut waker: EventWaker) {
    let mut last = loop {
        match store::lease::last_event_id(&hub.store().reader).await {
            Ok(id) => break id,
            Err(e) => {
                tracing::warn!(error = %e, "relay cannot read the newest event id; retrying");
                tokio::time::sleep(POLL).await;
            }
        }
    };
    loop {
        waker.wait(POLL).await;
        last = pass_on(&hub, last).await;
    }
}

/// Publishes the events stored after `last`; returns the new last id.
async fn pass_on(hub: &Hub, mut last: u64) -> u64 {
    let events = hub.events();
    loop {
        match store::events_after(&hub.store().reader, last, PAGE).await {
            Ok(page) => {
                for event in &page {
                    last = event.event_id;
                    let _ = events.send(event.clone());
                }
                if page.len() < PAGE as usize {
                    return last;
                }
            }
            Err(e) => {
                tracing::warn!(error = %e, "relay cannot read alert events; retrying");
                return last;
            }
        }
    }
}
