//! `gibbsline alerts deliveries`: where each alert event went (webhooks,
//! MQTT), or is waiting to go, from the server's outbox.

use super::client;
use super::output::{self, Col, Format, Row};
use gibbsline::pb;
use gibbsline::pb::alert_service_client::AlertServiceClient;
use serde::Serialize;

/// One delivery, as every format prints it (the proto's field names).
#[derive(Serialize)]
pub(crate) struct DeliveryOut {
    target: String,
    event_id: u64,
    alert_id: u64,
    channel_id: String,
    created_unix_ns: i64,
    attempts: u32,
    next_attempt_unix_ns: i64,
    delivered_unix_ns: Option<i64>,
    last_error: Option<String>,
}

impl From<pb::Delivery> for DeliveryOut {
    fn from(d: pb::Delivery) -> DeliveryOut {
        DeliveryOut {
            target: d.target,
            event_id: d.event_id,
            alert_id: d.alert_id,
            channel_id: d.channel_id,
            created_unix_ns: d.created_unix_ns,
            attempts: d.attempts,
            next_attempt_unix_ns: d.next_attempt_unix_ns,
            delivered_unix_ns: d.delivered_unix_ns,
            last_error: d.last_error,
        }
    }
}

impl Row for DeliveryOut {
    const CSV_HEADER: &'static [&'static str] = &[
        "target",
        "event_id",
        "alert_id",
        "channel_id",
        "created_unix_ns",
        "attempts",
        "next_attempt_unix_ns",
        "delivered_unix_ns",
        "last_error",
    ];
    const TABLE: &'static [Col] = &[
        Col::left("target", 16),
        Col::right("event", 7),
        Col::right("alert", 6),
        Col::left("channel", 14),
        Col::left("stored", 29),
        Col::right("tries", 5),
        Col::left("state", 0),
    ];
    fn table_cells(&self) -> Vec<String> {
        let state = match (&self.delivered_unix_ns, &self.last_error) {
            (Some(at), _) => format!("delivered {}", super::time::iso(*at)),
            (None, Some(e)) => format!(
                "pending, next try {}: last failed: {e}",
                super::time::iso(self.next_attempt_unix_ns)
            ),
            (None, None) => "pending".to_string(),
        };
        vec![
            self.target.clone(),
            self.event_id.to_string(),
            self.alert_id.to_string(),
            self.channel_id.clone(),
            super::time::iso(self.created_unix_ns),
            self.attempts.to_string(),
            state,
        ]
    }
}

/// Every delivery (or only the pending ones), page after page.
pub(crate) async fn run(connect: &str, pending_only: bool, format: Format) -> anyhow::Result<()> {
    let mut c = AlertServiceClient::new(client::connect(connect).await?);
    let mut rows = Vec::new();
    let (mut after_target, mut after_event_id) = (String::new(), 0);
    loop {
        let request = pb::ListDeliveriesRequest {
            pending_only,
            after_target: after_target.clone(),
            after_event_id,
            limit: 1000,
        };
        let page = c
            .list_deliveries(request)
            .await
            .map_err(client::status_error)?
            .into_inner();
        rows.extend(page.deliveries.into_iter().map(DeliveryOut::from));
        if page.next_after_target.is_empty() {
            return output::print_all(&rows, format);
        }
        (after_target, after_event_id) = (page.next_after_target, page.next_after_event_id);
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_csv_header_is_the_fields() {
        let row = DeliveryOut::from(pb::Delivery::default());
        assert_eq!(output::derived_csv_header(&row), DeliveryOut::CSV_HEADER);
    }
}
