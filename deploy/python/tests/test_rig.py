"""GibbslineRig against a real `gibbsline serve`: batches stored, a server
SIGKILLed and restarted while readings wait, every reading stored once."""

import os
import pathlib
import signal
import socket
import subprocess
import threading
import time

import grpc
import pytest

from gibbsline_rig import GibbslineRig
from gibbsline_rig.v1 import channel_pb2, channel_pb2_grpc, history_pb2, history_pb2_grpc

REPO = pathlib.Path(__file__).resolve().parents[3]
BIN = os.environ.get("GIBBSLINE_BIN", str(REPO / "target" / "debug" / "gibbsline"))


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


class Server:
    def __init__(self, db: pathlib.Path, port: int):
        self.db, self.port = db, port
        self.proc = None

    @property
    def address(self) -> str:
        return f"127.0.0.1:{self.port}"

    def start(self) -> None:
        self.proc = subprocess.Popen(
            [BIN, "serve", "--listen", self.address, "--db", str(self.db), "--http-listen", "off"],
            stdout=subprocess.DEVNULL,
            stderr=subprocess.DEVNULL,
        )
        with grpc.insecure_channel(self.address) as ch:
            grpc.channel_ready_future(ch).result(timeout=30)

    def kill(self) -> None:
        self.proc.send_signal(signal.SIGKILL)
        self.proc.wait()


@pytest.fixture
def server(tmp_path):
    if not pathlib.Path(BIN).exists():
        pytest.fail(f"{BIN} is missing: run `cargo build` first (or set GIBBSLINE_BIN)")
    s = Server(tmp_path / "py.db", free_port())
    s.start()
    yield s
    if s.proc.poll() is None:
        s.proc.terminate()
        s.proc.wait()


def define(address: str, channel_id: str) -> None:
    with grpc.insecure_channel(address) as ch:
        channel_pb2_grpc.ChannelServiceStub(ch).PutChannel(
            channel_pb2.PutChannelRequest(
                channel=channel_pb2.Channel(
                    channel_id=channel_id,
                    chemistry_id="vanadium-redox",
                    cells_in_series=1,
                    capacity_ah=2.0,
                    current_sign=channel_pb2.CURRENT_SIGN_CHARGE_POSITIVE,
                    default_temp_c=25.0,
                )
            ),
            timeout=10,
        )


def stored_seqs(address: str, channel_id: str) -> list:
    with grpc.insecure_channel(address) as ch:
        pages = history_pb2_grpc.HistoryServiceStub(ch).QueryReadings(
            history_pb2.QueryReadingsRequest(channel_id=channel_id, limit=100_000), timeout=30
        )
        return [r.seq for page in pages for r in page.readings]


def test_batches_are_stored_and_a_new_client_resumes(server):
    define(server.address, "py-1")
    t0 = time.time_ns() - 10**12
    rig = GibbslineRig(server.address, "py-1", batch_size=64)
    for i in range(300):
        assert rig.add(volts=1.35 + i * 1e-5, amps=0.5, temp_c=25.0, time_ns=t0 + i * 10**8) == i + 1
    assert rig.flush() == 300
    assert rig.pending == 0 and rig.refused == []
    assert stored_seqs(server.address, "py-1") == list(range(1, 301))
    later = GibbslineRig(server.address, "py-1")
    assert later.add(volts=1.36, time_ns=t0 + 300 * 10**8) == 301


def test_a_killed_server_loses_and_doubles_nothing(server):
    define(server.address, "py-2")
    t0 = time.time_ns() - 10**12
    rig = GibbslineRig(server.address, "py-2", batch_size=100, retry_first_s=0.1)
    for i in range(500):
        rig.add(volts=1.35, amps=-0.5, temp_c=25.0, time_ns=t0 + i * 10**8)
    rig.flush()
    server.kill()
    for i in range(500, 1000):
        rig.add(volts=1.34, amps=-0.5, temp_c=25.0, time_ns=t0 + i * 10**8)
    restart = threading.Timer(1.5, server.start)
    restart.start()
    assert rig.flush(timeout_s=60) == 1000
    restart.join()
    assert stored_seqs(server.address, "py-2") == list(range(1, 1001))


def test_a_refused_reading_is_named(server):
    define(server.address, "py-3")
    rig = GibbslineRig(server.address, "py-3")
    rig.add(volts=float("nan"), time_ns=time.time_ns() - 10**9)
    rig.flush()
    assert [(r.seq, r.field) for r in rig.refused] == [(1, "volts")]
