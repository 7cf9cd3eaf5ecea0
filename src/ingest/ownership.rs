//! Which channels this server may write, when several servers share one
//! PostgreSQL database. Each channel's live state (estimator, alert
//! rules, resume point) belongs to one server at a time through a lease
//! (`store::lease`): a server claims a channel when a rig streams to it
//! or asks for its resume point, renews its leases on a timer, and
//! stamps every write with the lease's fencing token, which the writer
//! checks in the write's own transaction. A server that stalls past its
//! lease is fenced out; the one that took over restored the channel from
//! the store first. On SQLite there is no `Ownership`: one server owns
//! every channel of its file.

use crate::store::{Pool, StoreError, lease};
use std::collections::HashMap;
use std::sync::Mutex;
use std::time::{Duration, Instant};

/// How long a lease lasts without renewal. A dead owner's channels move
/// after at most this (plus the rig's reconnect).
pub const LEASE: Duration = Duration::from_secs(8);
/// How often held leases are renewed: a quarter of the lease, so two
/// missed renewals still leave time.
pub const RENEW_EVERY: Duration = Duration::from_secs(2);
/// A lease is trusted locally only this long before its expiry: the
/// fence in the database is the real guard, this keeps a server that
/// cannot reach the database from deriving on state it may have lost.
const MARGIN: Duration = Duration::from_secs(2);

/// A lease this server holds.
#[derive(Debug, Clone, Copy)]
struct Held {
    token: i64,
    /// Until when (local monotonic clock) this server acts on it.
    trusted_until: Instant,
}

/// Refused: another server owns the channel.
#[derive(Debug, Clone, thiserror::Error)]
#[error(
    "channel {channel_id} is owned by the gibbsline server at {owner_addr}: stream to it (or retry here after its lease expires in {expires_in_ms} ms)"
)]
pub struct OwnedElsewhere {
    pub channel_id: String,
    pub owner_addr: String,
    pub expires_in_ms: i64,
}

/// This server's leases.
#[derive(Debug)]
pub struct Ownership {
    pool: Pool,
    /// This server's id in the lease table (unique per start).
    pub instance: String,
    /// Where rigs reach this server (told to rigs that stream elsewhere).
    pub addr: String,
    /// The machine's name: the instance id's prefix.
    host: String,
    held: Mutex<HashMap<String, Held>>,
}

impl Ownership {
    pub fn new(pool: Pool, addr: String) -> Ownership {
        let host = hostname();
        let instance = format!(
            "{host}-{}-{:x}",
            std::process::id(),
            crate::ingest::hub::now_ns() & 0xffff_ffff
        );
        Ownership {
            pool,
            instance,
            addr,
            host,
            held: Mutex::new(HashMap::new()),
        }
    }

    /// The token under which this server holds `name` now, if it trusts
    /// its lease (no database round trip).
    pub fn token(&self, name: &str) -> Option<i64> {
        let held = self.held.lock().expect("leases poisoned");
        held.get(name)
            .filter(|h| h.trusted_until > Instant::now())
            .map(|h| h.token)
    }

    /// Holds `name` (claiming it from the database unless a trusted lease
    /// is in hand); returns the token. `Err(Ok(..))`: another server owns it.
    pub async fn claim(
        &self,
        name: &str,
        channel_id: &str,
    ) -> Result<i64, Result<OwnedElsewhere, StoreError>> {
        if let Some(token) = self.token(name) {
            return Ok(token);
        }
        let asked = Instant::now();
        let lease_ms = LEASE.as_millis() as i64;
        let claimed = lease::claim(
            &self.pool,
            name,
            &self.instance,
            &self.addr,
            &self.host,
            lease_ms,
        );
        match claimed.await {
            Ok(lease::Claim::Held { token }) => {
                self.note(name, token, asked);
                Ok(token)
            }
            Ok(lease::Claim::Busy {
                owner_addr,
                expires_in_ms,
                ..
            }) => Err(Ok(OwnedElsewhere {
                channel_id: channel_id.to_string(),
                owner_addr,
                expires_in_ms,
            })),
            Err(e) => Err(Err(e)),
        }
    }

    fn note(&self, name: &str, token: i64, asked: Instant) {
        // Counted from when the claim was sent: the database's expiry is
        // at least that late.
        let trusted_until = asked + LEASE - MARGIN;
        self.held.lock().expect("leases poisoned").insert(
            name.to_string(),
            Held {
                token,
                trusted_until,
            },
        );
    }

    /// Renews every held lease; a lease the database no longer gives this
    /// server is dropped (another took it). Returns the names lost.
    pub async fn renew(&self) -> Result<Vec<String>, StoreError> {
        let asked = Instant::now();
        let kept = lease::renew(&self.pool, &self.instance, LEASE.as_millis() as i64).await?;
        let kept: HashMap<String, i64> = kept.into_iter().collect();
        let mut held = self.held.lock().expect("leases poisoned");
        let lost: Vec<String> = held
            .iter()
            .filter(|(name, h)| kept.get(*name) != Some(&h.token))
            .map(|(name, _)| name.clone())
            .collect();
        for name in &lost {
            held.remove(name);
        }
        for (name, token) in kept {
            if held.get(&name).is_some_and(|h| h.token == token) {
                held.insert(
                    name,
                    Held {
                        token,
                        trusted_until: asked + LEASE - MARGIN,
                    },
                );
            }
        }
        Ok(lost)
    }

    /// Gives every lease up (an ordered stop): other servers take the
    /// channels at once.
    pub async fn release_all(&self) {
        self.held.lock().expect("leases poisoned").clear();
        match lease::release_all(&self.pool, &self.instance).await {
            Ok(n) => tracing::info!(leases = n, "leases released"),
            Err(e) => tracing::warn!(error = %e, "leases not released; they expire by themselves"),
        }
    }
}

fn hostname() -> String {
    std::env::var("HOSTNAME")
        .ok()
        .or_else(|| std::fs::read_to_string("/etc/hostname").ok())
        .map(|h| h.trim().replace('-', "_"))
        .filter(|h| !h.is_empty())
        .unwrap_or_else(|| "gibbsline".into())
}
