//! A corpus of hostile input: each answered with a specific status and
//! message, the server still serving, and no good data lost.

use crate::harness::*;
use gibbsline::pb;
use gibbsline::pb::channel_service_client::ChannelServiceClient;
use gibbsline::pb::chemistry_service_client::ChemistryServiceClient;
use gibbsline::pb::history_service_client::HistoryServiceClient;
use gibbsline::pb::ingest_service_client::IngestServiceClient;
use prost::bytes::BufMut;
use tokio_stream::StreamExt;
use tonic::codec::{Codec, DecodeBuf, Decoder, EncodeBuf, Encoder};

/// Sends raw bytes as a gRPC message body; decodes the reply as `T`.
struct RawCodec<T>(std::marker::PhantomData<T>);

struct RawEncoder;
impl Encoder for RawEncoder {
    type Item = Vec<u8>;
    type Error = tonic::Status;
    fn encode(&mut self, item: Vec<u8>, dst: &mut EncodeBuf<'_>) -> Result<(), tonic::Status> {
        dst.put_slice(&item);
        Ok(())
    }
}

struct ProstDecoder<T>(std::marker::PhantomData<T>);
impl<T: prost::Message + Default> Decoder for ProstDecoder<T> {
    type Item = T;
    type Error = tonic::Status;
    fn decode(&mut self, src: &mut DecodeBuf<'_>) -> Result<Option<T>, tonic::Status> {
        T::decode(src)
            .map(Some)
            .map_err(|e| tonic::Status::internal(e.to_string()))
    }
}

impl<T: prost::Message + Default + Send + 'static> Codec for RawCodec<T> {
    type Encode = Vec<u8>;
    type Decode = T;
    type Encoder = RawEncoder;
    type Decoder = ProstDecoder<T>;
    fn encoder(&mut self) -> RawEncoder {
        RawEncoder
    }
    fn decoder(&mut self) -> ProstDecoder<T> {
        ProstDecoder(std::marker::PhantomData)
    }
}

async fn raw_unary(
    ch: &tonic::transport::Channel,
    path: &'static str,
    body: Vec<u8>,
) -> tonic::Status {
    let mut grpc = tonic::client::Grpc::new(ch.clone());
    grpc.ready().await.unwrap();
    grpc.unary::<Vec<u8>, pb::PutChannelResponse, _>(
        tonic::Request::new(body),
        tonic::codegen::http::uri::PathAndQuery::from_static(path),
        RawCodec(std::marker::PhantomData),
    )
    .await
    .unwrap_err()
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn hostile_corpus_gets_specific_answers() {
    let (_dir, db) = temp_db();
    let server = Server::start(&db).await;
    let ch = server.channel().await;
    let mut channels = ChannelServiceClient::new(ch.clone());
    let mut ingest =
        IngestServiceClient::new(ch.clone()).max_encoding_message_size(64 * 1024 * 1024);
    channels
        .put_channel(pb::PutChannelRequest {
            channel: Some(channel_def("good-1", "daniell")),
        })
        .await
        .unwrap();
    let t = now_ns() - 1_000_000_000_000;
    let mut send = async |readings: Vec<pb::Reading>| -> Result<pb::BatchAck, tonic::Status> {
        let mut acks = ingest
            .stream_readings(tokio_stream::iter(vec![pb::StreamReadingsRequest {
                batch: Some(pb::ReadingBatch {
                    historical: false,
                    channel_id: "good-1".into(),
                    batch_id: 0,
                    readings,
                }),
            }]))
            .await?
            .into_inner();
        acks.next().await.unwrap().map(|m| m.ack.unwrap())
    };
    assert_eq!(
        send(
            (1..=10)
                .map(|s| reading(s, t + s as i64 * 1_000_000_000, 1.08, Some(0.0)))
                .collect()
        )
        .await
        .unwrap()
        .accepted,
        10
    );
    let mut cases = 0;

    // Malformed protobuf bytes: a truncated varint, a wrong wire type, random noise.
    for garbage in [
        vec![0x0a, 0xff, 0xff, 0xff],
        vec![0x0d, 0x01],
        vec![0x8f; 64],
    ] {
        let status = raw_unary(&ch, "/gibbsline.v1.ChannelService/PutChannel", garbage).await;
        // The sender's fault: INVALID_ARGUMENT (see src/grpc/codec.rs).
        assert_eq!(status.code(), tonic::Code::InvalidArgument, "{status:?}");
        assert!(
            status.message().contains("malformed"),
            "{}",
            status.message()
        );
        cases += 1;
    }

    // Oversized message: beyond the 16 MiB limit.
    let huge: Vec<_> = (0..400_000)
        .map(|s| reading(100 + s, t, 1.08, None))
        .collect();
    let status = send(huge).await.unwrap_err();
    assert!(
        matches!(
            status.code(),
            tonic::Code::ResourceExhausted | tonic::Code::OutOfRange
        ),
        "{status:?}"
    );
    cases += 1;

    // A 1 MB channel id, control characters and odd Unicode in ids.
    for id in [
        "x".repeat(1_000_000),
        "tab\there".into(),
        "bell\u{7}".into(),
        "zero\u{200b}width".into(),
        "Ωmega".into(),
        "../../etc".into(),
        String::new(),
    ] {
        let s = channels
            .put_channel(pb::PutChannelRequest {
                channel: Some(channel_def(&id, "daniell")),
            })
            .await
            .unwrap_err();
        assert_eq!(s.code(), tonic::Code::InvalidArgument, "{id:.20}");
        assert!(s.message().contains("channel_id"), "{}", s.message());
        assert!(
            s.message().len() < 400,
            "the answer must not echo a huge id"
        );
        cases += 1;
    }
    let s = HistoryServiceClient::new(ch.clone())
        .get_channel_state(pb::GetChannelStateRequest {
            channel_id: "y".repeat(1_000_000),
        })
        .await
        .unwrap_err();
    assert_eq!(s.code(), tonic::Code::NotFound);
    assert!(s.message().len() < 400);
    cases += 1;

    // Seq, time and value extremes.
    let extremes = vec![
        reading(u64::MAX, t + 50_000_000_000, 1.08, None),
        reading(1 << 63, t + 51_000_000_000, 1.08, None),
        reading(20, 1, 1.08, None),
        reading(21, i64::MIN, 1.08, None),
        reading(22, i64::MAX, 1.08, None),
        reading(23, t + 53_000_000_000, f64::NAN, None),
        reading(24, t + 54_000_000_000, f64::NEG_INFINITY, None),
        reading(25, t + 55_000_000_000, 1e300, None),
        pb::Reading {
            temp_c: Some(f64::NAN),
            ..reading(26, t + 56_000_000_000, 1.08, None)
        },
        pb::Reading {
            temp_c: Some(-300.0),
            ..reading(27, t + 57_000_000_000, 1.08, None)
        },
        pb::Reading {
            amps: Some(f64::NAN),
            ..reading(28, t + 58_000_000_000, 1.08, None)
        },
        // Finite but absurd: found by the ingest_batch fuzz target, where
        // it turned the coulomb count infinite for the rest of the run.
        pb::Reading {
            amps: Some(-1e300),
            ..reading(29, t + 59_000_000_000, 1.08, None)
        },
    ];
    let n = extremes.len();
    let ack = send(extremes).await.unwrap();
    assert_eq!(ack.accepted, 0, "{:?}", ack.rejected);
    assert_eq!(ack.rejected.len(), n);
    let fields: Vec<_> = ack.rejected.iter().map(|r| r.field.as_str()).collect();
    assert_eq!(
        fields,
        [
            "seq",
            "seq",
            "time_unix_ns",
            "time_unix_ns",
            "time_unix_ns",
            "volts",
            "volts",
            "volts",
            "temp_c",
            "temp_c",
            "amps",
            "amps"
        ]
    );
    cases += n;

    // Invalid chemistries and channel definitions.
    let s = ChemistryServiceClient::new(ch.clone())
        .evaluate(pb::EvaluateRequest {
            chemistry_id: "unobtainium".into(),
            input: Some(pb::evaluate_request::Input::Volts(1.0)),
            ..Default::default()
        })
        .await
        .unwrap_err();
    assert_eq!(s.code(), tonic::Code::NotFound);
    let s = ChemistryServiceClient::new(ch.clone())
        .evaluate(pb::EvaluateRequest {
            chemistry_id: "daniell".into(),
            input: Some(pb::evaluate_request::Input::Volts(f64::NAN)),
            ..Default::default()
        })
        .await
        .unwrap_err();
    assert_eq!(s.code(), tonic::Code::InvalidArgument);
    assert!(s.message().contains("volts = NaN"));
    cases += 2;
    for (mutate, field) in [
        (
            Box::new(|c: &mut pb::Channel| c.capacity_ah = f64::NAN)
                as Box<dyn Fn(&mut pb::Channel)>,
            "capacity_ah",
        ),
        (
            Box::new(|c: &mut pb::Channel| c.current_sign = 99),
            "current_sign",
        ),
        (
            Box::new(|c: &mut pb::Channel| c.default_temp_c = 1e9),
            "default_temp_c",
        ),
        (
            Box::new(|c: &mut pb::Channel| c.coulombic_efficiency = 1.5),
            "coulombic_efficiency",
        ),
        (
            Box::new(|c: &mut pb::Channel| c.resistance_ohm = Some(-1.0)),
            "resistance_ohm",
        ),
        (
            Box::new(|c: &mut pb::Channel| c.e_standard_298_override_v = Some(f64::INFINITY)),
            "e_standard_298_override_v",
        ),
        (
            Box::new(|c: &mut pb::Channel| {
                c.plausible_min_cell_volts = 2.0;
                c.plausible_max_cell_volts = 1.0;
            }),
            "plausible_max_cell_volts",
        ),
        (
            Box::new(|c: &mut pb::Channel| {
                c.plausible_min_cell_volts = 0.0;
                c.plausible_max_cell_volts = 1e300;
            }),
            "plausible_max_cell_volts = 1.000e300",
        ),
    ] {
        let mut c = channel_def("good-2", "daniell");
        mutate(&mut c);
        let s = channels
            .put_channel(pb::PutChannelRequest { channel: Some(c) })
            .await
            .unwrap_err();
        assert_eq!(s.code(), tonic::Code::InvalidArgument);
        assert!(s.message().contains(field), "{field}: {}", s.message());
        cases += 1;
    }
    let s = channels
        .put_channel(pb::PutChannelRequest { channel: None })
        .await
        .unwrap_err();
    assert!(s.message().contains("channel"));
    cases += 1;

    // Still serving, and the good data is intact.
    let mut health = tonic_health::pb::health_client::HealthClient::new(ch.clone());
    assert!(
        health
            .check(tonic_health::pb::HealthCheckRequest {
                service: String::new()
            })
            .await
            .is_ok()
    );
    let ack = send(vec![reading(11, t + 11_000_000_000, 1.08, Some(0.0))])
        .await
        .unwrap();
    assert_eq!((ack.accepted, ack.last_stored_seq), (1, 11));
    eprintln!("hostile corpus: {cases} inputs answered");
    server.stop().await;
}
