//! `gibbsline rig run`: a scripted SCPI instrument on loopback (answers
//! in scientific notation, in mA and K; sometimes slow, sometimes a reply
//! that is not a number, sometimes a dropped connection), two channels
//! polled at 10 Hz, the server SIGKILLed and away for 30 s, the agent
//! SIGKILLed while it replays: every reading the agent spooled is stored
//! once, in order, with seqs that run without a gap.

use crate::crash::{connect, free_addr, spawn_server_with};
use crate::harness::*;
use gibbsline::pb;
use std::process::{Child, Command, Stdio};
use std::sync::Arc;
use std::sync::atomic::{AtomicU64, Ordering};
use std::time::Duration;
use tokio::io::{AsyncBufReadExt, AsyncWriteExt, BufReader};

/// Answers the queries a rig.toml names; every 23rd answer is garbage
/// (then `SYST:ERR?` says why), every 37th comes too late, every 53rd
/// connection-killing.
async fn instrument() -> (std::net::SocketAddr, Arc<AtomicU64>) {
    let listener = tokio::net::TcpListener::bind("127.0.0.1:0").await.unwrap();
    let addr = listener.local_addr().unwrap();
    let queries = Arc::new(AtomicU64::new(0));
    let counter = queries.clone();
    tokio::spawn(async move {
        while let Ok((stream, _)) = listener.accept().await {
            let counter = counter.clone();
            tokio::spawn(async move {
                let (read, mut write) = stream.into_split();
                let mut lines = BufReader::new(read).lines();
                while let Ok(Some(q)) = lines.next_line().await {
                    let n = counter.fetch_add(1, Ordering::SeqCst);
                    let reply = match q.trim() {
                        "SYST:ERR?" => "-113,\"Undefined header\"".to_string(),
                        _ if n % 53 == 52 => return,
                        _ if n % 23 == 22 => "garbage".to_string(),
                        "MEAS:VOLT?" => format!("{:+.6E}", 1.30 + (n % 100) as f64 * 1e-4),
                        "MEAS:CURR?" => "+1.500000E+03".to_string(),
                        "MEAS:TEMP?" => "+2.981500E+02".to_string(),
                        _ => continue,
                    };
                    if n % 37 == 36 {
                        tokio::time::sleep(Duration::from_millis(600)).await;
                    }
                    if write
                        .write_all(format!("{reply}\n").as_bytes())
                        .await
                        .is_err()
                    {
                        return;
                    }
                }
            });
        }
    });
    (addr, queries)
}

fn rig_toml(
    server: &str,
    instrument: std::net::SocketAddr,
    spool: &std::path::Path,
    metrics: &str,
) -> String {
    let mut text = format!(
        "connect = \"{server}\"\nspool = \"{}\"\nmetrics_listen = \"{metrics}\"\n",
        spool.display()
    );
    for channel in ["rig-a", "rig-b"] {
        text.push_str(&format!(
            "\n[[source]]\nchannel_id = \"{channel}\"\nkind = \"scpi\"\naddress = \"{instrument}\"\nperiod = \"100ms\"\n\
             timeout = \"300ms\"\ncurrent_sign = \"discharge_positive\"\n\
             volts = {{ query = \"MEAS:VOLT?\", unit = \"V\" }}\n\
             amps = {{ query = \"MEAS:CURR?\", unit = \"mA\" }}\n\
             temp_c = {{ query = \"MEAS:TEMP?\", unit = \"K\" }}\n"
        ));
    }
    text
}

fn spawn_agent(config: &std::path::Path, log: &std::path::Path) -> Child {
    Command::new(env!("CARGO_BIN_EXE_gibbsline"))
        .args(["rig", "run", "--config"])
        .arg(config)
        .env("RUST_LOG", "warn")
        // Logs go to stdout, as the server's do.
        .stdout(
            std::fs::OpenOptions::new()
                .create(true)
                .append(true)
                .open(log)
                .unwrap(),
        )
        .stderr(Stdio::null())
        .spawn()
        .unwrap()
}

/// The channel's readings once at least `n` are stored (10 s at most).
async fn stored_at_least(addr: &str, channel: &str, n: usize) -> Vec<pb::StoredReading> {
    for _ in 0..100 {
        let rows = stored(addr, channel).await;
        if rows.len() >= n {
            return rows;
        }
        tokio::time::sleep(Duration::from_millis(100)).await;
    }
    panic!("fewer than {n} readings of {channel} stored");
}

async fn stored(addr: &str, channel: &str) -> Vec<pb::StoredReading> {
    let ch = connect(addr).await;
    let mut history = pb::history_service_client::HistoryServiceClient::new(ch);
    stored_readings(&mut history, channel).await
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn spooled_readings_survive_a_server_outage_and_an_agent_kill() {
    let (dir, db) = temp_db();
    let (instrument, queries) = instrument().await;
    let addr = free_addr();
    let off: [&std::ffi::OsStr; 2] = ["--http-listen".as_ref(), "off".as_ref()];
    let mut server = spawn_server_with(&db, &addr, &off);
    let ch = connect(&addr).await;
    for id in ["rig-a", "rig-b"] {
        let def = pb::Channel {
            current_sign: pb::CurrentSign::ChargePositive as i32,
            ..channel_def(id, "vanadium-redox")
        };
        put_channel(&ch, def).await;
    }
    let config = dir.path().join("rig.toml");
    let spool = dir.path().join("spool.db");
    let metrics = free_addr();
    std::fs::write(&config, rig_toml(&addr, instrument, &spool, &metrics)).unwrap();
    let log = dir.path().join("agent.log");
    let mut agent = spawn_agent(&config, &log);
    tokio::time::sleep(Duration::from_secs(3)).await;

    // The server dies and stays away for 30 s; the agent keeps measuring.
    let before = stored(&addr, "rig-a").await.len();
    server.kill().unwrap();
    server.wait().unwrap();
    tokio::time::sleep(Duration::from_secs(30)).await;
    let mut server = spawn_server_with(&db, &addr, &off);
    connect(&addr).await;
    // The agent dies as soon as its replay has begun to land; a new one
    // takes over the spool.
    let mut replaying = false;
    for _ in 0..600 {
        if stored(&addr, "rig-a").await.len() > before {
            replaying = true;
            break;
        }
        tokio::time::sleep(Duration::from_millis(50)).await;
    }
    assert!(replaying, "the agent came back to the server within 30 s");
    agent.kill().unwrap();
    agent.wait().unwrap();
    let mut agent = spawn_agent(&config, &log);
    tokio::time::sleep(Duration::from_secs(3)).await;
    // The agent's own metrics: the garbage answers counted, the spool empty.
    let page = crate::web::request(metrics.parse().unwrap(), "GET", "/metrics", None, None).await;
    let text = String::from_utf8(page.body).unwrap();
    let value = |name: &str| -> f64 {
        let line = text
            .lines()
            .find(|l| l.starts_with(&format!("{name} ")))
            .unwrap_or_else(|| panic!("{name} in {text}"));
        line.rsplit(' ').next().unwrap().parse().unwrap()
    };
    assert!(value("gibbsline_rig_read_errors_total") > 0.0, "{text}");
    assert!(value("gibbsline_rig_acked_readings_total") > 0.0, "{text}");
    assert_eq!(value("gibbsline_rig_dropped_readings_total"), 0.0, "{text}");
    let _ = Command::new("kill")
        .arg("-TERM")
        .arg(agent.id().to_string())
        .status();
    agent.wait().unwrap();

    for channel in ["rig-a", "rig-b"] {
        let rows = stored(&addr, channel).await;
        let seqs: Vec<u64> = rows.iter().map(|r| r.seq).collect();
        // Over 36 s at 10 Hz less failed reads: a gap-free run from 1. A
        // reading takes three queries, about a quarter of readings meet a
        // garbage, late or missing answer, and each timeout costs 300 ms
        // of the 100 ms period: 190–250 readings seen here, depending on
        // the machine's load, so the bound only says the agent sampled
        // through the outage (ten seconds of it would be under 100).
        assert!(seqs.len() > 150, "{channel}: {} readings", seqs.len());
        assert_eq!(
            seqs,
            (1..=seqs.len() as u64).collect::<Vec<_>>(),
            "{channel}"
        );
        assert!(
            rows.windows(2)
                .all(|w| w[0].time_unix_ns < w[1].time_unix_ns),
            "{channel}: times rise"
        );
        let r = &rows[0];
        // 1500 mA discharge-positive → 1.5 A charging; 298.15 K → 25 °C.
        assert_eq!(r.amps_charge_positive, Some(-1.5));
        assert!((r.temp_c.unwrap() - 25.0).abs() < 1e-9, "{:?}", r.temp_c);
        assert!((1.30..1.32).contains(&r.volts), "{}", r.volts);
    }
    // Nothing is left waiting in the spool: all of it was acknowledged.
    let left: i64 = {
        let conn = rusqlite::Connection::open(&spool).unwrap();
        conn.query_row("SELECT COUNT(*) FROM spooled", [], |r| r.get(0))
            .unwrap()
    };
    assert_eq!(left, 0);
    let log_text = std::fs::read_to_string(&log).unwrap();
    assert!(
        log_text.contains("Undefined header"),
        "the instrument's error text is logged:\n{log_text}"
    );
    assert!(queries.load(Ordering::SeqCst) > 100);
    server.kill().unwrap();
    server.wait().unwrap();
}

/// The agent's /metrics and /health pages, once it answers (10 s).
async fn agent_page(metrics: &str, path: &str) -> crate::web::Answer {
    let addr: std::net::SocketAddr = metrics.parse().unwrap();
    for _ in 0..200 {
        if tokio::net::TcpStream::connect(addr).await.is_ok() {
            return crate::web::request(addr, "GET", path, None, None).await;
        }
        tokio::time::sleep(Duration::from_millis(50)).await;
    }
    panic!("the agent's metrics endpoint {metrics} did not answer in 10 s");
}

/// A spool on a disk with no room left: the agent cannot keep a reading
/// (each is spooled before it is sent), so it must say so, naming the
/// spool, in its log, its metrics and its health; and measure again once
/// there is room.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_full_spool_disk_is_named_in_the_log_the_metrics_and_health() {
    let Some(disk) = crate::faults::SmallDisk::mount("1m") else {
        return;
    };
    let (dir, db) = temp_db();
    let (instrument, _) = instrument().await;
    let addr = free_addr();
    let off: [&std::ffi::OsStr; 2] = ["--http-listen".as_ref(), "off".as_ref()];
    let mut server = spawn_server_with(&db, &addr, &off);
    let ch = connect(&addr).await;
    for id in ["rig-a", "rig-b"] {
        put_channel(&ch, channel_def(id, "vanadium-redox")).await;
    }
    let config = dir.path().join("rig.toml");
    let spool = disk.path().join("spool.db");
    let metrics = free_addr();
    let log = dir.path().join("agent.log");
    // The spool's file and tables, made while there was room, by an agent
    // that reaches no server (it writes nothing more).
    std::fs::write(
        &config,
        rig_toml(&free_addr(), instrument, &spool, &metrics),
    )
    .unwrap();
    let mut first = spawn_agent(&config, &dir.path().join("first.log"));
    agent_page(&metrics, "/health").await;
    first.kill().unwrap();
    first.wait().unwrap();
    let fill = disk.path().join("fill");
    let mut filler = std::fs::File::create(&fill).unwrap();
    while std::io::Write::write_all(&mut filler, &[0u8; 4096]).is_ok() {}
    drop(filler);

    std::fs::write(&config, rig_toml(&addr, instrument, &spool, &metrics)).unwrap();
    let mut agent = spawn_agent(&config, &log);
    let mut health = agent_page(&metrics, "/health").await;
    for _ in 0..200 {
        if health.status == 503 {
            break;
        }
        tokio::time::sleep(Duration::from_millis(50)).await;
        health = agent_page(&metrics, "/health").await;
    }
    let why = String::from_utf8_lossy(&health.body).to_string();
    assert_eq!(health.status, 503, "{why}");
    let named = format!("spool {}: cannot write", spool.display());
    assert!(
        why.contains(&named) && why.contains("disk is full"),
        "{why}"
    );
    let page = agent_page(&metrics, "/metrics").await;
    let text = String::from_utf8(page.body).unwrap();
    assert!(
        text.contains("\ngibbsline_rig_spool_writable 0\n"),
        "{text}"
    );
    assert!(
        !text.contains("\ngibbsline_rig_spool_write_errors_total 0\n"),
        "{text}"
    );
    let log_text = std::fs::read_to_string(&log).unwrap();
    assert!(log_text.contains(&named), "{log_text}");
    assert!(
        !log_text.contains('\u{1b}'),
        "a log into a file is plain text, no terminal colours:\n{log_text}"
    );
    assert!(
        !log_text.contains("server link"),
        "a spool fault is not blamed on the server:\n{log_text}"
    );

    // Room again: the agent measures and streams by itself.
    // (Its link retries at most 10 s apart.)
    std::fs::remove_file(&fill).unwrap();
    let mut rows = Vec::new();
    for _ in 0..300 {
        rows = stored(&addr, "rig-a").await;
        if !rows.is_empty() {
            break;
        }
        tokio::time::sleep(Duration::from_millis(100)).await;
    }
    assert_eq!(
        rows.first().map(|r| r.seq),
        Some(1),
        "measuring again within 30 s"
    );
    assert_eq!(agent_page(&metrics, "/health").await.status, 200);
    agent.kill().unwrap();
    agent.wait().unwrap();
    server.kill().unwrap();
    server.wait().unwrap();
}

/// A file an instrument program writes: `;`-separated with decimal
/// commas, elapsed seconds, mA; lines appended, one arriving in two
/// parts, the agent SIGKILLed and restarted, then the file cut short and
/// written anew.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_followed_file_is_read_once_across_partial_lines_kills_and_truncation() {
    let (dir, db) = temp_db();
    let server = Server::start(&db).await;
    let ch = server.channel().await;
    put_channel(&ch, channel_def("pstat-2", "vanadium-redox")).await;
    let data = dir.path().join("run42.csv");
    let line = |i: u64| format!("{},0;1,{:04};-1500,0;25,5\n", i, 3000 + i);
    let append = |text: &str| {
        use std::io::Write;
        let mut f = std::fs::OpenOptions::new()
            .create(true)
            .append(true)
            .open(&data)
            .unwrap();
        f.write_all(text.as_bytes()).unwrap();
    };
    append("time/s;Ewe/V;I/mA;T/degC\n");
    (0..10).for_each(|i| append(&line(i)));
    let config = dir.path().join("rig.toml");
    std::fs::write(
        &config,
        format!(
            "connect = \"{}\"\nspool = \"{}\"\n\n[[source]]\nchannel_id = \"pstat-2\"\nkind = \"file\"\naddress = \"{}\"\n\
             period = \"100ms\"\ndecimal_comma = true\n\
             time = {{ column = \"time/s\", format = \"elapsed_s\", start = \"2026-12-03T08:00:00Z\" }}\n\
             volts = {{ column = \"Ewe/V\", unit = \"V\" }}\namps = {{ column = \"I/mA\", unit = \"mA\" }}\n\
             temp_c = {{ column = \"#4\", unit = \"C\" }}\n",
            server.addr,
            dir.path().join("spool.db").display(),
            data.display()
        ),
    )
    .unwrap();
    let log = dir.path().join("agent.log");
    let addr = server.addr.to_string();
    let wait_for = |n: usize| stored_at_least(&addr, "pstat-2", n);
    let mut agent = spawn_agent(&config, &log);
    wait_for(10).await;
    (10..15).for_each(|i| append(&line(i)));
    append("15,0;1,30");
    wait_for(15).await;
    tokio::time::sleep(Duration::from_millis(400)).await;
    assert_eq!(
        stored(&addr, "pstat-2").await.len(),
        15,
        "a partial line waits"
    );
    append("15;-1500,0;25,5\n");
    wait_for(16).await;
    agent.kill().unwrap();
    agent.wait().unwrap();
    (16..20).for_each(|i| append(&line(i)));
    let mut agent = spawn_agent(&config, &log);
    wait_for(20).await;
    // Cut short and written anew: read from its start.
    std::fs::write(
        &data,
        format!(
            "time/s;Ewe/V;I/mA;T/degC\n{}{}{}",
            line(100),
            line(101),
            line(102)
        ),
    )
    .unwrap();
    let rows = wait_for(23).await;
    tokio::time::sleep(Duration::from_millis(400)).await;
    agent.kill().unwrap();
    agent.wait().unwrap();
    let rows_now = stored(&addr, "pstat-2").await;
    assert_eq!(rows_now.len(), 23, "nothing read twice");
    let seqs: Vec<u64> = rows.iter().map(|r| r.seq).collect();
    assert_eq!(seqs, (1..=23).collect::<Vec<_>>());
    let start_ns = 1_796_284_800_000_000_000; // 2026-12-03T08:00:00Z
    let r = &rows[2];
    assert_eq!(r.time_unix_ns, start_ns + 2_000_000_000);
    assert_eq!(r.volts, 1.3002);
    assert_eq!(r.amps_charge_positive, Some(-1.5));
    assert_eq!(r.temp_c, Some(25.5));
    assert_eq!(rows[15].volts, 1.3015, "the line that came in two parts");
    assert_eq!(rows[20].time_unix_ns, start_ns + 100_000_000_000);
    server.stop().await;
}

/// Registers of a Modbus unit, shared with the test: (input table?, address) → word.
type Registers = Arc<std::sync::Mutex<std::collections::HashMap<(bool, u16), u16>>>;

struct Unit(Registers);

impl tokio_modbus::server::Service for Unit {
    type Request = tokio_modbus::SlaveRequest<'static>;
    type Response = tokio_modbus::Response;
    type Exception = tokio_modbus::ExceptionCode;
    type Future = std::future::Ready<Result<Self::Response, Self::Exception>>;

    fn call(&self, req: Self::Request) -> Self::Future {
        use tokio_modbus::{ExceptionCode, Request, Response};
        let regs = self.0.lock().unwrap();
        let words = |input: bool, addr: u16, n: u16| -> Vec<u16> {
            (addr..addr + n)
                .map(|a| regs.get(&(input, a)).copied().unwrap_or(0))
                .collect()
        };
        let answer = match (req.slave, req.request) {
            (7, Request::ReadHoldingRegisters(a, n)) => {
                Ok(Response::ReadHoldingRegisters(words(false, a, n)))
            }
            (7, Request::ReadInputRegisters(a, n)) => {
                Ok(Response::ReadInputRegisters(words(true, a, n)))
            }
            (7, _) => Err(ExceptionCode::IllegalFunction),
            _ => Err(ExceptionCode::GatewayTargetDevice),
        };
        std::future::ready(answer)
    }
}

async fn modbus_unit(regs: Registers) -> std::net::SocketAddr {
    let listener = tokio::net::TcpListener::bind("127.0.0.1:0").await.unwrap();
    let addr = listener.local_addr().unwrap();
    let server = tokio_modbus::server::tcp::Server::new(listener);
    tokio::spawn(async move {
        let on_connected = move |stream, socket_addr| {
            let regs = regs.clone();
            async move {
                tokio_modbus::server::tcp::accept_tcp_connection(stream, socket_addr, move |_| {
                    Ok(Some(Unit(regs.clone())))
                })
            }
        };
        let _ = server.serve(&on_connected, |_| {}).await;
    });
    addr
}

/// A Modbus TCP unit whose registers change: f32 volts high word first,
/// i32 mA low word first, u16 tenths of °C in an input register.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn modbus_registers_are_read_signed_and_scaled() {
    let (dir, db) = temp_db();
    let server = Server::start(&db).await;
    put_channel(
        &server.channel().await,
        channel_def("bms-1", "vanadium-redox"),
    )
    .await;
    let regs: Registers = Arc::default();
    let set_amps = |regs: &Registers, words: [u16; 2]| {
        let mut r = regs.lock().unwrap();
        r.insert((false, 10), words[0]);
        r.insert((false, 11), words[1]);
    };
    {
        let mut r = regs.lock().unwrap();
        // 1.3125 as IEEE 754 single is 0x3FA8_0000.
        r.insert((false, 0), 0x3FA8);
        r.insert((false, 1), 0x0000);
        r.insert((true, 20), 253);
    }
    // −2,500 mA: 0xFFFF_F63C, low word first.
    set_amps(&regs, [0xF63C, 0xFFFF]);
    let unit = modbus_unit(regs.clone()).await;
    let config = dir.path().join("rig.toml");
    std::fs::write(
        &config,
        format!(
            "connect = \"{}\"\nspool = \"{}\"\n\n[[source]]\nchannel_id = \"bms-1\"\nkind = \"modbus\"\naddress = \"{unit}\"\n\
             unit_id = 7\nperiod = \"100ms\"\n\
             volts = {{ register = 0, type = \"f32\", unit = \"V\" }}\n\
             amps = {{ register = 10, type = \"i32\", word_order = \"low_first\", unit = \"mA\" }}\n\
             temp_c = {{ register = 20, table = \"input\", scale = 0.1, unit = \"C\" }}\n",
            server.addr,
            dir.path().join("spool.db").display()
        ),
    )
    .unwrap();
    let mut agent = spawn_agent(&config, &dir.path().join("agent.log"));
    let addr = server.addr.to_string();
    let wait_for = |n: usize| stored_at_least(&addr, "bms-1", n);
    let before = wait_for(5).await.len();
    // +1,200 mA: 0x0000_04B0, low word first.
    set_amps(&regs, [0x04B0, 0x0000]);
    let rows = wait_for(before + 5).await;
    agent.kill().unwrap();
    agent.wait().unwrap();
    assert!(rows.iter().all(|r| r.volts == 1.3125));
    assert!(rows.iter().all(|r| (r.temp_c.unwrap() - 25.3).abs() < 1e-9));
    assert_eq!(rows[0].amps_charge_positive, Some(-2.5));
    assert_eq!(rows.last().unwrap().amps_charge_positive, Some(1.2));
    server.stop().await;
}
