//! Alert delivery: webhooks (`[[notify.webhook]]`) and MQTT
//! (`[notify.mqtt]`). Every alert event a target wants gets a row in the
//! store's outbox in the transaction that stores the event
//! (`store::outbox`); one courier per target sends its rows in event
//! order, records each attempt through the writer, and retries a failure
//! with exponential backoff (1 s doubling to 10 s: a receiver back from an
//! outage is sent to within seconds) before anything after
//! it: at least once, in order, across restarts. Ingest never waits for
//! a target: couriers only read the store and queue small writer jobs.

mod mqtt;
mod webhook;

use crate::alerts::Severity;
use crate::error::FieldError;
use crate::ingest::{self, Hub, stopped};
use crate::store::outbox::{self, Attempt, Pending, Target};
use serde::{Deserialize, Serialize};
use std::sync::Arc;
use std::sync::atomic::Ordering::Relaxed;
use std::time::Duration;

/// Said in every notification: what the alert is and is not.
pub const NOTICE: &str = "Monitoring aid, not a safety system: alerts can be late or missing. \
Hardware interlocks, local codes and licensed practice govern.";

/// Pending deliveries read per look.
const PENDING_PAGE: u32 = 64;
/// First retry after a failure; doubles per attempt up to [`MAX_BACKOFF`].
const FIRST_BACKOFF: Duration = Duration::from_secs(1);
/// Longest wait between attempts: one small request per 10 s to an
/// absent receiver costs nothing, and a returning one is served at once.
const MAX_BACKOFF: Duration = Duration::from_secs(10);
/// A courier with nothing to send looks again after this (events wake it sooner).
const IDLE_LOOK: Duration = Duration::from_secs(2);

/// `[notify]`: where alert events go besides `WatchAlerts`.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, Default)]
#[serde(deny_unknown_fields)]
pub struct NotifySettings {
    /// `[[notify.webhook]]` tables.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub webhook: Vec<WebhookSpec>,
    /// `[notify.mqtt]`.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub mqtt: Option<MqttSpec>,
}

/// One webhook: events are POSTed as JSON, signed.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct WebhookSpec {
    /// Unique among targets; the URL if unset. Deliveries are kept by it.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub name: Option<String>,
    /// `http://host:port/path` or `https://…`.
    pub url: String,
    /// Least severity sent (`info`, `warning`, `critical`).
    #[serde(default = "default_min_severity")]
    pub min_severity: Severity,
    /// Channels sent; empty: every channel.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub channels: Vec<String>,
    /// Key of the HMAC-SHA256 signature (at least 16 characters).
    pub secret: String,
    /// Send to a link-local address (169.254.0.0/16, fe80::/10) or a cloud
    /// metadata name; refused unless set, for a URL and for what its name
    /// resolves to.
    #[serde(default, skip_serializing_if = "std::ops::Not::not")]
    pub allow_link_local: bool,
}

/// The lab's MQTT broker.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct MqttSpec {
    /// `host:port` of the broker (plain TCP).
    pub broker: String,
    /// Client id; unique per server on the broker.
    #[serde(default = "default_client_id")]
    pub client_id: String,
    /// Topics begin with this: `<prefix>/alerts/<channel_id>`,
    /// `<prefix>/state/<channel_id>`.
    #[serde(default = "default_topic_prefix")]
    pub topic_prefix: String,
    /// Least severity published.
    #[serde(default = "default_min_severity")]
    pub min_severity: Severity,
    /// Channels published; empty: every channel.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub channels: Vec<String>,
    /// Also publish each channel's latest state every this many seconds
    /// (0: never).
    #[serde(default)]
    pub state_interval_s: u64,
}

fn default_min_severity() -> Severity {
    Severity::Warning
}
fn default_client_id() -> String {
    "gibbsline".into()
}
fn default_topic_prefix() -> String {
    "gibbsline".into()
}

impl WebhookSpec {
    /// The name deliveries are kept under.
    pub fn target_name(&self) -> String {
        self.name.clone().unwrap_or_else(|| self.url.clone())
    }
}

impl NotifySettings {
    /// Refuses what could not be delivered to, naming the entry.
    pub fn validate(&self) -> Result<(), FieldError> {
        let mut names = std::collections::BTreeSet::new();
        for (i, w) in self.webhook.iter().enumerate() {
            let field = |f: &str| format!("notify.webhook[{i}].{f}");
            let shown: String = w
                .url
                .chars()
                .take(200)
                .collect::<String>()
                .escape_debug()
                .to_string();
            let endpoint = webhook::Endpoint::parse(&w.url)
                .map_err(|e| FieldError::new(field("url"), &shown, e))?;
            if !w.allow_link_local && webhook::names_link_local(endpoint.host()) {
                return Err(FieldError::new(
                    field("url"),
                    &shown,
                    "a link-local or cloud-metadata address; set allow_link_local = true on this webhook if that is meant",
                ));
            }
            if w.secret.chars().count() < 16 {
                return Err(FieldError::new(
                    field("secret"),
                    "(hidden)",
                    "must be at least 16 characters",
                ));
            }
            if !names.insert(w.target_name()) || w.target_name() == "mqtt" {
                return Err(FieldError::new(
                    field("name"),
                    w.target_name(),
                    "another target has this name",
                ));
            }
        }
        if let Some(m) = &self.mqtt {
            mqtt::split_broker(&m.broker)
                .map_err(|e| FieldError::new("notify.mqtt.broker", &m.broker, e))?;
            if m.topic_prefix.is_empty() || m.topic_prefix.contains(['+', '#']) {
                return Err(FieldError::new(
                    "notify.mqtt.topic_prefix",
                    &m.topic_prefix,
                    "must be non-empty, without + or #",
                ));
            }
        }
        Ok(())
    }

    /// The targets as the outbox keeps them.
    pub fn targets(&self) -> Vec<Target> {
        let mut out: Vec<Target> = self
            .webhook
            .iter()
            .map(|w| Target {
                name: w.target_name(),
                kind: "webhook",
                min_severity: w.min_severity.code(),
                channels: w.channels.clone(),
            })
            .collect();
        if let Some(m) = &self.mqtt {
            out.push(Target {
                name: "mqtt".into(),
                kind: "mqtt",
                min_severity: m.min_severity.code(),
                channels: m.channels.clone(),
            });
        }
        out
    }
}

/// Stores the targets and starts a courier for each (and the MQTT
/// connection with its state publisher).
pub async fn start(
    hub: &Arc<Hub>,
    settings: &NotifySettings,
) -> Result<Vec<tokio::task::JoinHandle<()>>, crate::store::StoreError> {
    let targets = settings.targets();
    hub.store()
        .write(async |tx| outbox::set_targets(tx, &targets).await)
        .await?;
    let mut tasks = Vec::new();
    for w in &settings.webhook {
        let sender = Sender::Webhook(webhook::Webhook::new(w));
        tasks.push(tokio::spawn(courier(hub.clone(), w.target_name(), sender)));
    }
    if let Some(m) = &settings.mqtt {
        let (link, mut more) = mqtt::connect(hub.clone(), m);
        tasks.append(&mut more);
        tasks.push(tokio::spawn(courier(
            hub.clone(),
            "mqtt".into(),
            Sender::Mqtt(link),
        )));
    }
    Ok(tasks)
}

/// What a courier sends through.
enum Sender {
    Webhook(webhook::Webhook),
    Mqtt(mqtt::Link),
}

impl Sender {
    async fn send(&mut self, p: &Pending) -> Result<(), String> {
        let body = payload(p);
        match self {
            Sender::Webhook(w) => w.post(p.event.event_id, &body).await,
            Sender::Mqtt(m) => m.publish_alert(&p.event.alert.channel_id, body).await,
        }
    }
}

/// The JSON every target gets: the event as `WatchAlerts` gives it (the
/// API's field names), its id (the idempotency key) and the notice.
pub fn payload(p: &Pending) -> Vec<u8> {
    let pb = crate::grpc::convert::event_to_pb(&p.event);
    let mut v = serde_json::to_value(&pb).unwrap_or_default();
    v["event_id"] = p.event.event_id.into();
    v["notice"] = NOTICE.into();
    serde_json::to_vec(&v).unwrap_or_default()
}

/// The wait before attempt `attempts + 1` after `attempts` failures.
pub fn backoff(attempts: u32) -> Duration {
    let doubled = FIRST_BACKOFF.saturating_mul(1u32 << attempts.saturating_sub(1).min(16));
    doubled.min(MAX_BACKOFF)
}

/// Whether this server delivers `target`'s events: always on SQLite; on
/// a shared database, while it holds the target's lease (one courier per
/// target among the servers, so events go out once and in order).
async fn delivers_here(hub: &Hub, target: &str) -> bool {
    let Some(own) = hub.ownership() else {
        return true;
    };
    own.claim(&format!("notify:{target}"), target).await.is_ok()
}

/// Sends one target's deliveries in event order until the server stops.
async fn courier(hub: Arc<Hub>, target: String, mut sender: Sender) {
    let mut wake = hub.subscribe();
    let stop = hub.shutdown_signal();
    loop {
        if !delivers_here(&hub, &target).await {
            tokio::select! {
                _ = tokio::time::sleep(IDLE_LOOK) => {}
                _ = stopped(stop.clone()) => return,
            }
            continue;
        }
        let page = match outbox::pending(&hub.store().reader, &target, PENDING_PAGE).await {
            Ok(page) => page,
            Err(e) => {
                tracing::warn!(target, error = %e, "reading the outbox");
                Vec::new()
            }
        };
        if page.is_empty() {
            tokio::select! {
                _ = wake.recv() => {}
                _ = tokio::time::sleep(IDLE_LOOK) => {}
                _ = stopped(stop.clone()) => return,
            }
            continue;
        }
        for p in page {
            let wait_ns = p.next_attempt_ns - ingest::now_ns();
            if wait_ns > 0 {
                tokio::select! {
                    _ = tokio::time::sleep(Duration::from_nanos(wait_ns as u64)) => {}
                    _ = stopped(stop.clone()) => return,
                }
            }
            if !attempt(&hub, &target, &mut sender, &p).await {
                // Nothing after a failed event goes before it.
                break;
            }
        }
    }
}

/// One attempt, recorded; whether it was delivered.
async fn attempt(hub: &Hub, target: &str, sender: &mut Sender, p: &Pending) -> bool {
    let result = sender.send(p).await;
    let now_ns = ingest::now_ns();
    let metrics = hub.metrics();
    let attempt = match &result {
        Ok(()) => {
            metrics.deliveries_ok.fetch_add(1, Relaxed);
            metrics.note_delivery_latency(now_ns - p.created_ns);
            Attempt::Delivered { at_ns: now_ns }
        }
        Err(error) => {
            metrics.deliveries_failed.fetch_add(1, Relaxed);
            let retry = backoff(p.attempts + 1);
            tracing::warn!(target, event_id = p.event.event_id, attempts = p.attempts + 1, %error, retry_s = retry.as_secs(), "alert delivery failed");
            Attempt::Failed {
                error: error.clone(),
                retry_at_ns: now_ns + retry.as_nanos() as i64,
            }
        }
    };
    let event_id = p.event.event_id;
    let target = target.to_string();
    let recorded = hub
        .submit(|reply| ingest::Job::Delivery {
            target,
            event_id,
            attempt,
            reply,
        })
        .await;
    if let Err(e) = recorded {
        // Not recorded: it is sent again later (the key lets receivers
        // drop the repeat).
        tracing::warn!(error = %e, event_id, "recording a delivery");
        tokio::time::sleep(FIRST_BACKOFF).await;
        return false;
    }
    result.is_ok()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn backoff_doubles_from_one_second_to_ten() {
        let waits: Vec<u64> = (1..=6).map(|a| backoff(a).as_secs()).collect();
        assert_eq!(waits, [1, 2, 4, 8, 10, 10]);
        assert_eq!(backoff(u32::MAX), MAX_BACKOFF);
    }

    #[test]
    fn settings_are_refused_by_the_entry_at_fault() {
        let hook = |url: &str, secret: &str| WebhookSpec {
            name: None,
            url: url.into(),
            min_severity: Severity::Warning,
            channels: vec![],
            secret: secret.into(),
            allow_link_local: false,
        };
        let cases = [
            (
                hook("ftp://x/y", "0123456789abcdef"),
                "notify.webhook[0].url",
            ),
            (
                hook("http://169.254.169.254/latest", "0123456789abcdef"),
                "notify.webhook[0].url",
            ),
            (
                hook("http://x/y\r\nX-Extra: 1", "0123456789abcdef"),
                "notify.webhook[0].url",
            ),
            (hook("http://x:1/y", "short"), "notify.webhook[0].secret"),
        ];
        for (w, field) in cases {
            let s = NotifySettings {
                webhook: vec![w],
                mqtt: None,
            };
            let e = s.validate().unwrap_err();
            assert!(e.to_string().starts_with(field), "{e}");
            assert!(
                !e.to_string().contains("short"),
                "a secret is never repeated: {e}"
            );
        }
        let allowed = NotifySettings {
            webhook: vec![WebhookSpec {
                allow_link_local: true,
                ..hook("http://169.254.10.2:8080/x", "0123456789abcdef")
            }],
            mqtt: None,
        };
        assert!(allowed.validate().is_ok());
        let twice = NotifySettings {
            webhook: vec![
                hook("http://a/x", "0123456789abcdef"),
                hook("http://a/x", "0123456789abcdef"),
            ],
            mqtt: None,
        };
        assert!(
            twice
                .validate()
                .unwrap_err()
                .to_string()
                .contains("notify.webhook[1].name")
        );
    }
}
