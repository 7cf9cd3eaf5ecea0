use crate::harness::*;
use gibbsline::pb;
use gibbsline::pb::alert_service_client::AlertServiceClient;
use gibbsline::pb::channel_service_client::ChannelServiceClient;
use gibbsline::pb::ingest_service_client::IngestServiceClient;
use std::time::{Duration, Instant};
use tokio_stream::StreamExt;

type Ch = tonic::transport::Channel;

async fn send_one(ingest: &mut IngestServiceClient<Ch>, batch: pb::ReadingBatch) -> pb::BatchAck {
    let outbound = tokio_stream::iter(vec![pb::StreamReadingsRequest { batch: Some(batch) }]);
    let mut inbound = ingest.stream_readings(outbound).await.unwrap().into_inner();
    inbound.next().await.unwrap().unwrap().ack.unwrap()
}

/// Daniell defaults: voltage limit window 0.85–1.30 V per cell.
fn limit_batch(
    channel: &str,
    t0: i64,
    seqs: std::ops::Range<u64>,
    over: impl Fn(u64) -> bool,
) -> pb::ReadingBatch {
    pb::ReadingBatch {
        historical: false,
        channel_id: channel.into(),
        batch_id: seqs.start,
        readings: seqs
            .map(|s| {
                reading(
                    s,
                    t0 + s as i64 * 1_000_000,
                    if over(s) { 1.35 } else { 1.10 },
                    Some(0.0),
                )
            })
            .collect(),
    }
}

async fn collect_until_live(
    stream: &mut tonic::Streaming<pb::WatchAlertsResponse>,
) -> Vec<pb::WatchAlertsResponse> {
    let mut out = Vec::new();
    loop {
        let m = stream.next().await.unwrap().unwrap();
        if m.event == pb::AlertEventKind::Live as i32 {
            return out;
        }
        out.push(m);
    }
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn raise_watch_acknowledge_restart_replay() {
    let (_dir, db) = temp_db();
    let server = Server::start(&db).await;
    let ch = server.channel().await;
    put_channel(&ch, channel_def("teach-1", "daniell")).await;
    let mut ingest = IngestServiceClient::new(ch.clone());
    let mut alerts = AlertServiceClient::new(ch.clone());
    let mut watch = alerts
        .watch_alerts(pb::WatchAlertsRequest {
            after_event_id: 0,
            ..Default::default()
        })
        .await
        .unwrap()
        .into_inner();
    assert!(collect_until_live(&mut watch).await.is_empty());

    let t0 = now_ns() - 10_000_000_000;
    // Over the limit at seq 3..=4, back inside at 5: one raise, one clear.
    send_one(
        &mut ingest,
        limit_batch("teach-1", t0, 1..7, |s| (3..=4).contains(&s)),
    )
    .await;
    let raised = watch.next().await.unwrap().unwrap();
    assert_eq!(raised.event, pb::AlertEventKind::Raised as i32);
    let a = raised.alert.unwrap();
    assert_eq!(
        (a.kind, a.raised_seq, a.severity),
        (
            pb::AlertKind::VoltageLimit as i32,
            3,
            pb::Severity::Critical as i32
        )
    );
    let cleared = watch.next().await.unwrap().unwrap();
    assert_eq!(cleared.event, pb::AlertEventKind::Cleared as i32);
    assert!(cleared.alert.unwrap().cleared_unix_ns.is_some());

    // Acknowledge reaches the subscriber; unknown id is NOT_FOUND.
    let acked = alerts
        .acknowledge_alert(pb::AcknowledgeAlertRequest {
            alert_id: a.alert_id,
            acknowledged_by: "night shift".into(),
            note: "probe reseated".into(),
        })
        .await
        .unwrap()
        .into_inner()
        .alert
        .unwrap();
    assert_eq!(acked.acknowledged_by.as_deref(), Some("night shift"));
    let update = watch.next().await.unwrap().unwrap();
    assert_eq!(update.event, pb::AlertEventKind::Acknowledged as i32);
    let last_seen = update.resume_after_event_id;
    let missing = alerts
        .acknowledge_alert(pb::AcknowledgeAlertRequest {
            alert_id: 999_999,
            acknowledged_by: "x".into(),
            note: String::new(),
        })
        .await
        .unwrap_err();
    assert_eq!(missing.code(), tonic::Code::NotFound);
    assert!(missing.message().contains("999999"));
    drop(watch);

    // While nobody watches: a raise that stays active.
    send_one(&mut ingest, limit_batch("teach-1", t0, 7..9, |_| true)).await;
    server.stop().await;

    // Restart: stored alerts survive; replay after the last seen id gives
    // exactly the missed event, and the still-active condition is not raised again.
    let server = Server::start(&db).await;
    let ch = server.channel().await;
    let mut ingest = IngestServiceClient::new(ch.clone());
    let mut alerts = AlertServiceClient::new(ch.clone());
    let list = alerts
        .list_alerts(pb::ListAlertsRequest::default())
        .await
        .unwrap()
        .into_inner();
    assert_eq!(list.alerts.len(), 2);
    let mut watch = alerts
        .watch_alerts(pb::WatchAlertsRequest {
            after_event_id: last_seen,
            ..Default::default()
        })
        .await
        .unwrap()
        .into_inner();
    let replay = collect_until_live(&mut watch).await;
    assert_eq!(replay.len(), 1, "{replay:?}");
    assert_eq!(replay[0].alert.as_ref().unwrap().raised_seq, 7);
    assert!(replay[0].resume_after_event_id > last_seen);
    send_one(&mut ingest, limit_batch("teach-1", t0, 9..11, |_| true)).await;
    let active = alerts
        .list_alerts(pb::ListAlertsRequest {
            active_only: true,
            ..Default::default()
        })
        .await
        .unwrap()
        .into_inner();
    assert_eq!(active.alerts.len(), 1);

    // Rules round-trip; a bad rule names its field.
    let rules = alerts
        .get_alert_rules(pb::GetAlertRulesRequest {
            channel_id: "teach-1".into(),
        })
        .await
        .unwrap()
        .into_inner()
        .rules
        .unwrap();
    let mut bad = rules;
    bad.end_of_charge_soc.as_mut().unwrap().clear_at = 0.99;
    let s = alerts
        .put_alert_rules(pb::PutAlertRulesRequest {
            channel_id: "teach-1".into(),
            rules: Some(bad),
        })
        .await
        .unwrap_err();
    assert_eq!(s.code(), tonic::Code::InvalidArgument);
    assert!(
        s.message().contains("end_of_charge_soc.clear_at = 0.99"),
        "{}",
        s.message()
    );
    let mut tighter = rules;
    tighter.safe_max_cell_volts = 1.40;
    alerts
        .put_alert_rules(pb::PutAlertRulesRequest {
            channel_id: "teach-1".into(),
            rules: Some(tighter),
        })
        .await
        .unwrap();
    let back = alerts
        .get_alert_rules(pb::GetAlertRulesRequest {
            channel_id: "teach-1".into(),
        })
        .await
        .unwrap()
        .into_inner()
        .rules
        .unwrap();
    assert_eq!(back.safe_max_cell_volts, 1.40);
    server.stop().await;
}

async fn timed_ingest(
    ingest: &mut IngestServiceClient<Ch>,
    channel: &str,
    t0: i64,
    total: u64,
) -> Duration {
    let start = Instant::now();
    let batches: Vec<_> = (0..total / 1000)
        .map(|b| limit_batch(channel, t0, b * 1000 + 1..b * 1000 + 1001, |s| s % 10 == 0))
        .map(|b| pb::StreamReadingsRequest { batch: Some(b) })
        .collect();
    let n = batches.len();
    let mut inbound = ingest
        .stream_readings(tokio_stream::iter(batches))
        .await
        .unwrap()
        .into_inner();
    for _ in 0..n {
        let ack = inbound.next().await.unwrap().unwrap().ack.unwrap();
        assert_eq!(ack.accepted, 1000);
    }
    start.elapsed()
}

/// A subscriber that never reads while 100,000 readings (and 20,000 alert
/// events, far more than its buffer) stream in: ingest finishes, and the subscriber is told where to resume.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn stalled_subscriber_never_slows_ingest() {
    let (_dir, db) = temp_db();
    let server = Server::start(&db).await;
    let ch = server.channel().await;
    let mut channels = ChannelServiceClient::new(ch.clone());
    for id in ["free-run", "watched-run"] {
        channels
            .put_channel(pb::PutChannelRequest {
                channel: Some(channel_def(id, "daniell")),
            })
            .await
            .unwrap();
    }
    let mut ingest = IngestServiceClient::new(ch.clone());
    let t0 = now_ns() - 1_000_000_000_000;
    let without = timed_ingest(&mut ingest, "free-run", t0, 100_000).await;

    let mut alerts = AlertServiceClient::new(server.channel().await);
    let mut stalled = alerts
        .watch_alerts(pb::WatchAlertsRequest {
            after_event_id: 0,
            channel_id: "watched-run".into(),
            ..Default::default()
        })
        .await
        .unwrap()
        .into_inner();
    let with = timed_ingest(&mut ingest, "watched-run", t0, 100_000).await;
    eprintln!(
        "ingest of 100,000 readings: {without:?} without a subscriber, {with:?} with a stalled one"
    );
    // Not a speed target: a subscriber that blocked ingest would stall it
    // outright; a generous ratio absorbs machine noise.
    assert!(with.as_secs_f64() < 3.0 * without.as_secs_f64() + 1.0);
    let mut saw_resume = false;
    while let Some(m) = stalled.next().await {
        match m {
            Ok(_) => continue,
            Err(status) => {
                assert_eq!(status.code(), tonic::Code::ResourceExhausted);
                assert!(
                    status.message().contains("after_id"),
                    "{}",
                    status.message()
                );
                saw_resume = true;
                break;
            }
        }
    }
    assert!(saw_resume);
    server.stop().await;
}
