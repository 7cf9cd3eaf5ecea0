//! The HTTP side under heavy and hostile use, against the server as its
//! own process so its memory can be read: eight maximal JSON reads, a
//! bucket width that would make a bucket per nanosecond, 128 slowloris
//! connections and 1,000 live-feed clients that never read.

use crate::crash::{connect, free_addr, spawn_server_with};
use crate::harness::*;
use gibbsline::pb::ingest_service_client::IngestServiceClient;
use std::net::{Ipv4Addr, SocketAddr};
use std::process::Child;
use std::time::{Duration, Instant};
use tokio::io::{AsyncReadExt, AsyncWriteExt};
use tokio::net::TcpStream;

/// The README's bound on the server's peak memory under each load here
/// (the unit file's memory limit is 512 MiB).
const RSS_BOUND_MIB: f64 = 256.0;
/// Readings in the channel read whole by each of the eight.
const READINGS: u64 = 200_000;

fn spawn_with_http(db: &std::path::Path, grpc: &str, http: &str) -> Child {
    spawn_server_with(db, grpc, &["--http-listen".as_ref(), http.as_ref()])
}

/// Streams a GET's body without keeping it: (status, bytes, readings).
async fn get_counting(http: SocketAddr, path: &'static str) -> (u16, u64, usize) {
    use http_body_util::BodyExt;
    let tcp = TcpStream::connect(http).await.unwrap();
    let (mut send, conn) = hyper::client::conn::http1::handshake(hyper_util::rt::TokioIo::new(tcp))
        .await
        .unwrap();
    tokio::spawn(conn);
    let request = hyper::Request::get(path)
        .header("host", "127.0.0.1")
        .body(http_body_util::Empty::<hyper::body::Bytes>::new())
        .unwrap();
    let answer = send.send_request(request).await.unwrap();
    let status = answer.status().as_u16();
    let mut body = answer.into_body();
    const KEY: &[u8] = b"\"seq\":";
    let (mut bytes, mut seqs, mut carry) = (0u64, 0usize, Vec::new());
    while let Some(frame) = body.frame().await {
        let frame = frame.expect("the answer ended with an error, not its end");
        if let Ok(data) = frame.into_data() {
            bytes += data.len() as u64;
            carry.extend_from_slice(&data);
            seqs += carry.windows(KEY.len()).filter(|w| *w == KEY).count();
            // What is kept is shorter than the key: never counted twice.
            carry.drain(..carry.len().saturating_sub(KEY.len() - 1));
        }
    }
    (status, bytes, seqs)
}

async fn wait_for_http(http: SocketAddr) {
    for _ in 0..200 {
        if TcpStream::connect(http).await.is_ok() {
            return;
        }
        tokio::time::sleep(Duration::from_millis(50)).await;
    }
    panic!("no HTTP listener on {http}");
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn maximal_json_reads_hold_bounded_memory_and_a_bucket_flood_is_refused() {
    let (_dir, db) = temp_db();
    let (grpc, http) = (free_addr(), free_addr());
    let mut server = spawn_with_http(&db, &grpc, &http);
    let ch = connect(&grpc).await;
    crate::faults::fill(&ch, "mem-2", READINGS).await;
    let http: SocketAddr = http.parse().unwrap();
    wait_for_http(http).await;
    let after_fill = crate::flood::peak_rss_mib(server.id());

    let reads: Vec<_> = (0..8)
        .map(|_| {
            tokio::spawn(get_counting(
                http,
                "/api/v1/channels/mem-2/readings?limit=1000000",
            ))
        })
        .collect();
    let buckets = crate::web::request(
        http,
        "GET",
        "/api/v1/channels/mem-2/buckets?bucket_width_ns=1&start_unix_ns=0",
        None,
        None,
    )
    .await;
    let text = String::from_utf8_lossy(&buckets.body).to_string();
    assert_eq!(buckets.status, 400, "{text}");
    assert!(
        text.contains("bucket_width_ns") && text.contains("100000"),
        "the refusal names the field and the bound: {text}"
    );
    let mut total = 0;
    for r in reads {
        let (status, bytes, seqs) = r.await.unwrap();
        assert_eq!((status, seqs), (200, READINGS as usize), "{bytes} bytes");
        total += bytes;
    }
    let peak = crate::flood::peak_rss_mib(server.id());
    eprintln!(
        "8 JSON reads of {READINGS} readings ({} MB in all) and a 1 ns bucket request: server peak RSS {peak:.0} MiB ({after_fill:.0} MiB before the reads)",
        total / 1_000_000
    );
    assert!(peak < RSS_BOUND_MIB, "peak RSS {peak:.0} MiB");
    server.kill().unwrap();
    server.wait().unwrap();
}

/// Opens a live feed from `source` and sends its request; never reads.
async fn live_client(http: SocketAddr, source: Ipv4Addr) -> TcpStream {
    let socket = tokio::net::TcpSocket::new_v4().unwrap();
    socket.bind(SocketAddr::from((source, 0))).unwrap();
    let mut stream = socket.connect(http).await.unwrap();
    stream
        .write_all(b"GET /api/v1/live?channel_id=live-1 HTTP/1.1\r\nHost: x\r\n\r\n")
        .await
        .unwrap();
    stream
}

/// The status line's code and (for a refusal) the rest of the answer.
async fn answer_of(stream: &mut TcpStream) -> (u16, String) {
    let mut head = [0u8; 12];
    stream.read_exact(&mut head).await.unwrap();
    let code: u16 = std::str::from_utf8(&head[9..12]).unwrap().parse().unwrap();
    if code == 200 {
        return (code, String::new());
    }
    // Refused feeds are closed by the server: read to the end.
    let mut rest = Vec::new();
    tokio::time::timeout(Duration::from_secs(10), stream.read_to_end(&mut rest))
        .await
        .expect("a refused feed's connection is closed by the server")
        .unwrap();
    (code, String::from_utf8_lossy(&rest).to_string())
}

/// Writes a byte to each connection every 100 ms, as a slowloris client
/// does; returns how long until the server had closed every one.
async fn trickle(mut slow: Vec<TcpStream>, give_up: Duration) -> Option<Duration> {
    let started = Instant::now();
    let mut open: Vec<bool> = vec![true; slow.len()];
    while started.elapsed() < give_up {
        for (s, o) in slow.iter_mut().zip(open.iter_mut()) {
            if *o && s.write_all(b"x").await.is_err() {
                *o = false;
            }
        }
        if open.iter().all(|o| !o) {
            return Some(started.elapsed());
        }
        tokio::time::sleep(Duration::from_millis(100)).await;
    }
    None
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn slowloris_and_a_thousand_unread_live_feeds_leave_the_api_answering() {
    // Two thousand sockets in this process alone.
    rlimit::increase_nofile_limit(8192).unwrap();
    let (_dir, db) = temp_db();
    let (grpc, http) = (free_addr(), free_addr());
    let mut server = spawn_with_http(&db, &grpc, &http);
    let ch = connect(&grpc).await;
    put_channel(&ch, channel_def("live-1", "daniell")).await;
    let http: SocketAddr = http.parse().unwrap();
    wait_for_http(http).await;

    let mut slow = Vec::new();
    for _ in 0..128 {
        let mut s = TcpStream::connect(http).await.unwrap();
        s.write_all(b"GET /api/v1/overview HTTP/1.1\r\nHost: x\r\nX-Slow: ")
            .await
            .unwrap();
        slow.push(s);
    }
    let slowloris = tokio::spawn(trickle(slow, Duration::from_secs(25)));

    // Twenty feeds from one address: sixteen are given, four refused
    // (which four depends on the order the server takes them in).
    let one = Ipv4Addr::new(127, 0, 0, 2);
    let mut feeds = Vec::new();
    for _ in 0..20 {
        feeds.push(live_client(http, one).await);
    }
    let mut given = Vec::new();
    for mut f in feeds {
        match answer_of(&mut f).await {
            (200, _) => given.push(f),
            (429, text) => assert!(text.contains("client 127.0.0.2: 16 live feeds"), "{text}"),
            other => panic!("{other:?}"),
        }
    }
    assert_eq!(given.len(), 16, "feeds given to one address");
    let mut feeds = given;
    // Then 980 more from other addresses, sixteen each.
    for i in 0..980u32 {
        let source = Ipv4Addr::new(127, 0, 1 + (i / 16 / 250) as u8, 1 + (i / 16 % 250) as u8);
        feeds.push(live_client(http, source).await);
    }

    // A liveness bound, not a speed target: the API and health answer
    // while all of that is attached.
    let overview = tokio::time::timeout(
        Duration::from_secs(1),
        crate::web::request(http, "GET", "/api/v1/overview", None, None),
    )
    .await
    .expect("/api/v1/overview answered within 1 s");
    assert_eq!(overview.status, 200);
    // Ingest goes on while no feed reads (each would be dropped, not waited for).
    let mut ingest = IngestServiceClient::new(ch.clone());
    let t0 = now_ns() - 600_000_000_000;
    let batches: Vec<_> = (0..10u64)
        .map(|b| gibbsline::pb::ReadingBatch {
            historical: false,
            channel_id: "live-1".into(),
            batch_id: b + 1,
            readings: (b * 2_000 + 1..(b + 1) * 2_000 + 1)
                .map(|s| reading(s, t0 + s as i64 * 10_000_000, 1.10, Some(0.0)))
                .collect(),
        })
        .collect();
    let acks = send_batches(&mut ingest, batches).await;
    assert_eq!(acks.iter().map(|a| a.accepted).sum::<u32>(), 20_000);
    let peak = crate::flood::peak_rss_mib(server.id());

    let (mut served, mut refused) = (0, 0);
    for f in &mut feeds[16..] {
        match answer_of(f).await {
            (200, _) => served += 1,
            (429, text) => {
                assert!(text.contains("256 live feeds are open"), "{text}");
                refused += 1;
            }
            other => panic!("{other:?}"),
        }
    }
    let closed_after = slowloris.await.unwrap();
    eprintln!(
        "128 slowloris + 1,000 live clients: overview answered, server peak RSS {peak:.0} MiB, feeds {} given / {} refused, slowloris all closed after {closed_after:?}",
        served + 16,
        refused + 4
    );
    assert_eq!(served + 16, 256, "feeds given in all");
    assert_eq!(refused, 1000 - 256 - 4);
    assert!(
        closed_after.is_some(),
        "the server closes connections that never finish their request head"
    );
    assert!(peak < RSS_BOUND_MIB, "peak RSS {peak:.0} MiB");
    server.kill().unwrap();
    server.wait().unwrap();
}
