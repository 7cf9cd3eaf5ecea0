//! `AlertService`: the live feed ([`crate::alerts::feed`]), the stored
//! alerts, acknowledgements and per-channel rules.

use super::BoxStream;
use super::convert::{alert_to_pb, event_to_pb, rules_from_pb, rules_to_pb};
use super::status::{check_person, invalid};
use crate::alerts::feed::{self, FeedItem};
use crate::ingest::{self, Hub, IngestError};
use crate::pb;
use crate::store;
use std::sync::Arc;
use tokio_stream::StreamExt;
use tonic::{Request, Response, Status};

/// `AlertService`: live alerts with replay, the stored list, acknowledgement.
pub struct AlertApi {
    pub(super) hub: Arc<Hub>,
}

#[tonic::async_trait]
impl pb::alert_service_server::AlertService for AlertApi {
    type WatchAlertsStream = BoxStream<pb::WatchAlertsResponse>;

    async fn watch_alerts(
        &self,
        request: Request<pb::WatchAlertsRequest>,
    ) -> Result<Response<Self::WatchAlertsStream>, Status> {
        let q = request.into_inner();
        if !q.channel_id.is_empty() {
            self.hub.channel(&q.channel_id)?;
        }
        let filter = feed::Filter {
            channel_id: q.channel_id,
            min_severity: i64::from(q.min_severity),
        };
        let items = feed::watch(&self.hub, filter, q.after_event_id)?;
        Ok(Response::new(Box::pin(
            items.map(|item| item.map(item_to_pb).map_err(Status::from)),
        )))
    }

    async fn list_alerts(
        &self,
        request: Request<pb::ListAlertsRequest>,
    ) -> Result<Response<pb::ListAlertsResponse>, Status> {
        let q = request.into_inner();
        let key = if q.channel_id.is_empty() {
            None
        } else {
            Some(self.hub.channel_key(&q.channel_id)?)
        };
        let limit = match q.limit {
            0 => 100,
            l if l > 10_000 => return Err(invalid("limit", l, "must be at most 10000")),
            l => l,
        };
        let rows = store::list_alerts(
            &self.hub.store().reader,
            key,
            i64::from(q.min_severity),
            q.active_only,
            q.after_alert_id,
            limit,
        )
        .await?;
        let next_after_alert_id = if rows.len() == limit as usize {
            rows.last().map(|a| a.alert_id).unwrap_or(0)
        } else {
            0
        };
        Ok(Response::new(pb::ListAlertsResponse {
            alerts: rows.iter().map(alert_to_pb).collect(),
            next_after_alert_id,
        }))
    }

    async fn acknowledge_alert(
        &self,
        request: Request<pb::AcknowledgeAlertRequest>,
    ) -> Result<Response<pb::AcknowledgeAlertResponse>, Status> {
        let q = request.into_inner();
        check_person("acknowledged_by", &q.acknowledged_by, &q.note)?;
        let alert_id = q.alert_id;
        let outcome = self
            .hub
            .submit(|reply| ingest::Job::Acknowledge {
                alert_id,
                by: q.acknowledged_by,
                note: q.note,
                time_ns: ingest::now_ns(),
                reply,
            })
            .await?;
        let event = outcome
            .events
            .into_iter()
            .next()
            .ok_or(IngestError::AlertNotFound(alert_id))?;
        Ok(Response::new(pb::AcknowledgeAlertResponse {
            alert: Some(alert_to_pb(&event.alert)),
        }))
    }

    async fn get_alert_rules(
        &self,
        request: Request<pb::GetAlertRulesRequest>,
    ) -> Result<Response<pb::GetAlertRulesResponse>, Status> {
        let rt = self.hub.channel(&request.into_inner().channel_id)?;
        let rules = rt.lock().expect("channel state poisoned").rules;
        Ok(Response::new(pb::GetAlertRulesResponse {
            rules: Some(rules_to_pb(&rules)),
        }))
    }

    async fn put_alert_rules(
        &self,
        request: Request<pb::PutAlertRulesRequest>,
    ) -> Result<Response<pb::PutAlertRulesResponse>, Status> {
        let q = request.into_inner();
        let rules = rules_from_pb(
            q.rules
                .ok_or_else(|| invalid("rules", "unset", "rules are required"))?,
        )?;
        self.hub.put_rules(&q.channel_id, rules).await?;
        Ok(Response::new(pb::PutAlertRulesResponse {
            rules: Some(rules_to_pb(&rules)),
        }))
    }

    async fn list_deliveries(
        &self,
        request: Request<pb::ListDeliveriesRequest>,
    ) -> Result<Response<pb::ListDeliveriesResponse>, Status> {
        let q = request.into_inner();
        let limit = match q.limit {
            0 => 100,
            l if l > 10_000 => return Err(invalid("limit", l, "must be at most 10000")),
            l => l,
        };
        let after = (q.after_target.as_str(), q.after_event_id);
        let rows =
            store::outbox::list(&self.hub.store().reader, q.pending_only, after, limit).await?;
        let (next_after_target, next_after_event_id) = match rows.last() {
            Some(last) if rows.len() == limit as usize => (last.target.clone(), last.event_id),
            _ => (String::new(), 0),
        };
        Ok(Response::new(pb::ListDeliveriesResponse {
            deliveries: rows.iter().map(delivery_to_pb).collect(),
            next_after_target,
            next_after_event_id,
        }))
    }
}

fn delivery_to_pb(d: &store::outbox::DeliveryRow) -> pb::Delivery {
    pb::Delivery {
        target: d.target.clone(),
        event_id: d.event_id,
        alert_id: d.alert_id,
        channel_id: d.channel_id.clone(),
        created_unix_ns: d.created_ns,
        attempts: d.attempts,
        next_attempt_unix_ns: d.next_attempt_ns,
        delivered_unix_ns: d.delivered_ns,
        last_error: d.last_error.clone(),
    }
}

fn item_to_pb(item: FeedItem) -> pb::WatchAlertsResponse {
    match item {
        FeedItem::Event(e) => event_to_pb(&e),
        FeedItem::Live { resume_after_id } => pb::WatchAlertsResponse {
            event: pb::AlertEventKind::Live as i32,
            alert: None,
            resume_after_event_id: resume_after_id,
        },
        FeedItem::Overflow { resume_after_id } => pb::WatchAlertsResponse {
            event: pb::AlertEventKind::Overflow as i32,
            alert: None,
            resume_after_event_id: resume_after_id,
        },
    }
}
