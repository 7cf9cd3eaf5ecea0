use crate::harness::*;
use gibbsline::pb;
use gibbsline::pb::channel_service_client::ChannelServiceClient;
use gibbsline::pb::history_service_client::HistoryServiceClient;
use gibbsline::pb::ingest_service_client::IngestServiceClient;
use tokio_stream::StreamExt;

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn stream_store_query_restart_resend() {
    let (_dir, db) = temp_db();
    let server = Server::start(&db).await;
    let ch = server.channel().await;
    let mut channels = ChannelServiceClient::new(ch.clone());
    let mut ingest = IngestServiceClient::new(ch.clone());
    let mut history = HistoryServiceClient::new(ch.clone());
    for (id, chem) in [("bench-a", "vanadium-redox"), ("bench-b", "daniell")] {
        let r = channels
            .put_channel(pb::PutChannelRequest {
                channel: Some(channel_def(id, chem)),
            })
            .await
            .unwrap()
            .into_inner();
        assert!(r.new_run);
    }
    let t0 = now_ns() - 3_600_000_000_000;
    let batch = |id: &str, from: u64, n: u64, volts: f64| pb::ReadingBatch {
        historical: false,
        channel_id: id.into(),
        batch_id: from,
        readings: (from..from + n)
            // At rest: the terminal voltage is the open-circuit voltage, so
            // the stored thermodynamics must equal the core's at that voltage.
            .map(|s| reading(s, t0 + s as i64 * 1_000_000_000, volts, Some(0.0)))
            .collect(),
    };
    let acks = send_batches(
        &mut ingest,
        vec![
            batch("bench-a", 1, 100, 1.35),
            batch("bench-b", 1, 50, 1.08),
        ],
    )
    .await;
    assert_eq!(
        (
            acks[0].accepted,
            acks[0].duplicates,
            acks[0].last_stored_seq
        ),
        (100, 0, 100)
    );
    assert_eq!(acks[1].accepted, 50);

    // Derived values agree with the core.
    let stored = stored_readings(&mut history, "bench-b").await;
    assert_eq!(stored.len(), 50);
    let first = &stored[0];
    let d = first.derived.as_ref().unwrap();
    let chem = gibbsline::electrochem::Registry::builtin()
        .get("daniell")
        .unwrap();
    let core = gibbsline::electrochem::evaluate(
        &chem,
        gibbsline::electrochem::EvalRequest {
            stack_volts: 1.08,
            cells_in_series: 1,
            temp_k: 298.15,
            equilibrium_tolerance_volts: 1e-3,
        },
    )
    .unwrap();
    assert_eq!(d.ocv_source, pb::OcvSource::Rest as i32);
    assert!((d.delta_g_kj_per_mol.unwrap() - core.thermo.delta_g_kj_per_mol).abs() < 1e-9);
    assert!((d.log10_k - core.thermo.log10_k()).abs() < 1e-9);
    assert_eq!(d.soc_from_model, core.soc);

    // Buckets: 100 readings at 1 s into 10 s buckets.
    let b = history
        .query_buckets(pb::QueryBucketsRequest {
            channel_id: "bench-a".into(),
            start_unix_ns: t0,
            end_unix_ns: t0 + 200_000_000_000,
            bucket_width_ns: 10_000_000_000,
        })
        .await
        .unwrap()
        .into_inner();
    assert_eq!(b.buckets.iter().map(|b| b.count).sum::<u64>(), 100);
    assert!(
        b.buckets
            .iter()
            .all(|b| (b.volts.as_ref().unwrap().mean - 1.35).abs() < 1e-12)
    );
    // Aligned: every bucket starts on a whole multiple of its width, and
    // asking from another start inside the first bucket gives the same ones.
    assert!(
        b.buckets
            .iter()
            .all(|b| b.start_unix_ns % 10_000_000_000 == 0)
    );
    let later = history
        .query_buckets(pb::QueryBucketsRequest {
            channel_id: "bench-a".into(),
            start_unix_ns: b.buckets[0].start_unix_ns + 3_000_000_000,
            end_unix_ns: t0 + 200_000_000_000,
            bucket_width_ns: 10_000_000_000,
        })
        .await
        .unwrap()
        .into_inner();
    assert_eq!(later.buckets, b.buckets);

    // Restart on the same file; everything acknowledged is there, and a
    // resend from an earlier seq counts duplicates and stores only the new.
    server.stop().await;
    let server = Server::start(&db).await;
    let ch = server.channel().await;
    let mut ingest = IngestServiceClient::new(ch.clone());
    let mut history = HistoryServiceClient::new(ch.clone());
    assert_eq!(stored_readings(&mut history, "bench-a").await.len(), 100);
    let acks = send_batches(&mut ingest, vec![batch("bench-a", 91, 20, 1.35)]).await;
    assert_eq!(
        (
            acks[0].accepted,
            acks[0].duplicates,
            acks[0].last_stored_seq
        ),
        (10, 10, 110)
    );
    let all = stored_readings(&mut history, "bench-a").await;
    assert_eq!(all.len(), 110);
    let mut seqs: Vec<_> = all.iter().map(|r| r.seq).collect();
    seqs.dedup();
    assert_eq!(seqs.len(), 110);
    server.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn bad_input_is_answered_and_costs_no_good_reading() {
    let (_dir, db) = temp_db();
    let server = Server::start(&db).await;
    let ch = server.channel().await;
    let mut channels = ChannelServiceClient::new(ch.clone());
    let mut ingest = IngestServiceClient::new(ch.clone());
    let mut history = HistoryServiceClient::new(ch.clone());
    channels
        .put_channel(pb::PutChannelRequest {
            channel: Some(channel_def("cell-1", "daniell")),
        })
        .await
        .unwrap();
    let t = now_ns() - 1_000_000_000_000;
    let mut readings = vec![
        reading(1, t, 1.08, Some(0.0)),                // good
        reading(2, t + 1_000_000_000, f64::NAN, None), // NaN volts
        reading(3, t + 2_000_000_000, 9.0, None),      // outside plausibility window
        pb::Reading {
            temp_c: Some(250.0),
            ..reading(4, t + 3_000_000_000, 1.08, None)
        },
        reading(5, -5, 1.08, None), // time before 2000
        reading(6, now_ns() + 3 * 86_400_000_000_000, 1.08, None), // far future
        pb::Reading {
            amps: Some(f64::INFINITY),
            ..reading(7, t + 6_000_000_000, 1.08, None)
        },
        reading(8, t + 7_000_000_000, 1.09, Some(0.0)), // good
    ];
    let acks = send_batches(
        &mut ingest,
        vec![pb::ReadingBatch {
            historical: false,
            channel_id: "cell-1".into(),
            batch_id: 1,
            readings: readings.clone(),
        }],
    )
    .await;
    let ack = &acks[0];
    assert_eq!(ack.accepted, 2);
    let fields: Vec<_> = ack
        .rejected
        .iter()
        .map(|r| (r.index, r.field.as_str()))
        .collect();
    assert_eq!(
        fields,
        vec![
            (1, "volts"),
            (2, "volts"),
            (3, "temp_c"),
            (4, "time_unix_ns"),
            (5, "time_unix_ns"),
            (6, "amps")
        ]
    );
    assert!(
        ack.rejected[0].reason.contains("NaN"),
        "{}",
        ack.rejected[0].reason
    );
    assert!(ack.rejected[1].reason.contains("plausibility"));

    // A late reading (seq below the stored maximum, not a duplicate) is kept and flagged.
    readings = vec![reading(7, t + 6_500_000_000, 1.085, Some(0.0))];
    let acks = send_batches(
        &mut ingest,
        vec![pb::ReadingBatch {
            historical: false,
            channel_id: "cell-1".into(),
            batch_id: 2,
            readings,
        }],
    )
    .await;
    assert_eq!((acks[0].accepted, acks[0].out_of_order), (1, 1));

    // Unknown channel and empty batch: in-band rejections, stream stays open.
    let acks = send_batches(
        &mut ingest,
        vec![
            pb::ReadingBatch {
                historical: false,
                channel_id: "nope".into(),
                batch_id: 3,
                readings: vec![reading(1, t, 1.0, None)],
            },
            pb::ReadingBatch {
                historical: false,
                channel_id: "cell-1".into(),
                batch_id: 4,
                readings: vec![],
            },
            pb::ReadingBatch {
                historical: false,
                channel_id: "cell-1".into(),
                batch_id: 5,
                readings: vec![reading(9, t + 9_000_000_000, 1.08, Some(0.0))],
            },
        ],
    )
    .await;
    assert_eq!(acks[0].rejected[0].field, "channel_id");
    assert!(acks[0].rejected[0].reason.contains("\"nope\""));
    assert_eq!(acks[1].rejected[0].field, "readings");
    assert_eq!(acks[2].accepted, 1);

    // Oversized batch: RESOURCE_EXHAUSTED.
    let big: Vec<_> = (100..10_200)
        .map(|s| reading(s, t + s as i64 * 1_000_000, 1.08, None))
        .collect();
    let outbound = tokio_stream::iter(vec![pb::StreamReadingsRequest {
        batch: Some(pb::ReadingBatch {
            historical: false,
            channel_id: "cell-1".into(),
            batch_id: 6,
            readings: big,
        }),
    }]);
    let mut inbound = ingest.stream_readings(outbound).await.unwrap().into_inner();
    let status = inbound.next().await.unwrap().unwrap_err();
    assert_eq!(status.code(), tonic::Code::ResourceExhausted);

    // Malformed channel definitions name the field.
    let mut bad = channel_def("cell-2", "daniell");
    bad.cells_in_series = 0;
    let s = channels
        .put_channel(pb::PutChannelRequest { channel: Some(bad) })
        .await
        .unwrap_err();
    assert_eq!(s.code(), tonic::Code::InvalidArgument);
    assert!(
        s.message().contains("cells_in_series = 0"),
        "{}",
        s.message()
    );
    let s = channels
        .put_channel(pb::PutChannelRequest {
            channel: Some(channel_def("Bad Id", "daniell")),
        })
        .await
        .unwrap_err();
    assert!(s.message().contains("channel_id"), "{}", s.message());
    let s = channels
        .put_channel(pb::PutChannelRequest {
            channel: Some(channel_def("cell-3", "unobtainium")),
        })
        .await
        .unwrap_err();
    assert!(s.message().contains("chemistry_id"), "{}", s.message());

    // Good data survived all of it.
    assert_eq!(stored_readings(&mut history, "cell-1").await.len(), 4);
    server.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn health_and_reflection_answer() {
    let (_dir, db) = temp_db();
    let server = Server::start(&db).await;
    let ch = server.channel().await;
    let mut health = tonic_health::pb::health_client::HealthClient::new(ch.clone());
    let r = health
        .check(tonic_health::pb::HealthCheckRequest {
            service: String::new(),
        })
        .await
        .unwrap()
        .into_inner();
    assert_eq!(
        r.status,
        tonic_health::pb::health_check_response::ServingStatus::Serving as i32
    );
    let mut refl =
        tonic_reflection::pb::v1::server_reflection_client::ServerReflectionClient::new(ch.clone());
    let req = tonic_reflection::pb::v1::ServerReflectionRequest {
        host: String::new(),
        message_request: Some(
            tonic_reflection::pb::v1::server_reflection_request::MessageRequest::ListServices(
                String::new(),
            ),
        ),
    };
    let mut s = refl
        .server_reflection_info(tokio_stream::iter(vec![req]))
        .await
        .unwrap()
        .into_inner();
    let resp = s.next().await.unwrap().unwrap();
    let Some(
        tonic_reflection::pb::v1::server_reflection_response::MessageResponse::ListServicesResponse(
            list,
        ),
    ) = resp.message_response
    else {
        panic!("no service list");
    };
    let names: Vec<_> = list.service.iter().map(|s| s.name.as_str()).collect();
    for want in [
        "gibbsline.v1.IngestService",
        "gibbsline.v1.AlertService",
        "grpc.health.v1.Health",
    ] {
        assert!(names.contains(&want), "{names:?}");
    }
    server.stop().await;
}

/// A rig whose clock went back sends a late reading with a new, higher seq:
/// it is stored out of order and raises the resume point, and a restarted
/// server agrees with the running one about what comes next.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn late_reading_with_a_high_seq_moves_the_resume_point_across_restarts() {
    let (_dir, db) = temp_db();
    let t0 = now_ns() - 600_000_000_000;
    let at = |s: i64| t0 + s * 1_000_000_000;
    let batch = |readings: Vec<pb::Reading>| pb::ReadingBatch {
        historical: false,
        channel_id: "clock-1".into(),
        readings,
        batch_id: 1,
    };
    let server = Server::start(&db).await;
    let ch = server.channel().await;
    put_channel(&ch, channel_def("clock-1", "daniell")).await;
    let mut ingest = IngestServiceClient::new(ch.clone());
    let acks = send_batches(
        &mut ingest,
        vec![batch(vec![
            reading(1, at(10), 1.08, Some(0.0)),
            reading(2, at(20), 1.08, Some(0.0)),
            // The clock went back 15 s.
            reading(3, at(5), 1.08, Some(0.0)),
        ])],
    )
    .await;
    assert_eq!(
        (
            acks[0].accepted,
            acks[0].out_of_order,
            acks[0].last_stored_seq
        ),
        (3, 1, 3)
    );
    server.stop().await;

    let server = Server::start(&db).await;
    let ch = server.channel().await;
    let mut ingest = IngestServiceClient::new(ch.clone());
    let resume = ingest
        .get_resume_point(pb::GetResumePointRequest {
            channel_id: "clock-1".into(),
        })
        .await
        .unwrap()
        .into_inner();
    assert_eq!(resume.last_stored_seq, 3);
    let acks = send_batches(
        &mut ingest,
        vec![batch(vec![
            // Resent: a duplicate whichever server sees it.
            reading(3, at(5), 1.08, Some(0.0)),
            reading(4, at(30), 1.08, Some(0.0)),
        ])],
    )
    .await;
    assert_eq!(
        (
            acks[0].accepted,
            acks[0].duplicates,
            acks[0].out_of_order,
            acks[0].last_stored_seq
        ),
        (1, 1, 0, 4)
    );
    let mut history = HistoryServiceClient::new(ch);
    let stored = stored_readings(&mut history, "clock-1").await;
    // History comes in time order: the late reading first.
    let late: Vec<(u64, bool)> = stored
        .iter()
        .map(|r| (r.seq, r.derived.as_ref().unwrap().out_of_order))
        .collect();
    assert_eq!(late, [(3, true), (1, false), (2, false), (4, false)]);
    server.stop().await;
}
