"""A rig client for gibbsline: readings are numbered, kept until the
server has acknowledged them (it acknowledges only after commit), sent in
batches on one stream, and resent after a break from the server's resume
point. The server stores a seq once, so a resend is counted as a duplicate,
never stored twice.

    rig = GibbslineRig("127.0.0.1:50051", "b3-vrb-1")
    rig.add(volts=1.402, amps=2.5, temp_c=24.1)
    rig.flush()

Monitoring only: gibbsline's alerts are aids, not a safety system;
hardware interlocks, local codes and licensed practice govern.
"""

from __future__ import annotations

import collections
import queue
import time
from dataclasses import dataclass
from typing import Deque, Optional

import grpc

from gibbsline_rig.v1 import ingest_pb2, ingest_pb2_grpc

__all__ = ["GibbslineRig", "Refused"]


@dataclass(frozen=True)
class Refused:
    """A reading the server refused, with the field and reason it named."""

    seq: int
    field: str
    reason: str


class GibbslineRig:
    """One channel's readings to a gibbsline server.

    Current is in the channel's own sign convention (as its definition on
    the server says). ``token`` is a bearer token (a rig token granted the
    channel); ``credentials`` are ``grpc.ssl_channel_credentials(...)`` for
    a TLS server.
    """

    def __init__(
        self,
        address: str,
        channel_id: str,
        *,
        token: Optional[str] = None,
        credentials: Optional[grpc.ChannelCredentials] = None,
        batch_size: int = 500,
        max_buffered: int = 1_000_000,
        retry_first_s: float = 0.2,
        retry_max_s: float = 10.0,
    ) -> None:
        if not 1 <= batch_size <= 10_000:
            raise ValueError(f"batch_size = {batch_size}: must be from 1 to 10000")
        self.address = address
        self.channel_id = channel_id
        self.batch_size = batch_size
        self.max_buffered = max_buffered
        self.retry_first_s = retry_first_s
        self.retry_max_s = retry_max_s
        self.refused: list[Refused] = []
        self.dropped = 0
        self._metadata = [("authorization", f"Bearer {token}")] if token else []
        self._credentials = credentials
        self._buffer: Deque[ingest_pb2.Reading] = collections.deque()
        self._next_seq: Optional[int] = None
        self._stored_up_to = 0

    # -- the rig's side -----------------------------------------------------

    def add(
        self,
        volts: float,
        amps: Optional[float] = None,
        temp_c: Optional[float] = None,
        time_ns: Optional[int] = None,
    ) -> int:
        """Keeps one reading for sending; returns its seq."""
        if self._next_seq is None:
            self._next_seq = self._resume_point() + 1
        reading = ingest_pb2.Reading(
            seq=self._next_seq,
            time_unix_ns=time_ns if time_ns is not None else time.time_ns(),
            volts=volts,
        )
        if amps is not None:
            reading.amps = amps
        if temp_c is not None:
            reading.temp_c = temp_c
        self._buffer.append(reading)
        self._next_seq += 1
        while len(self._buffer) > self.max_buffered:
            self._buffer.popleft()
            self.dropped += 1
        return reading.seq

    def flush(self, timeout_s: float = 60.0) -> int:
        """Sends everything kept until the server has acknowledged it,
        reconnecting and resuming as often as needed within ``timeout_s``.
        Returns the highest seq the server holds."""
        deadline = time.monotonic() + timeout_s
        retry = self.retry_first_s
        while self._buffer:
            try:
                self._send_all()
                retry = self.retry_first_s
            except grpc.RpcError as e:
                if time.monotonic() + retry > deadline:
                    raise TimeoutError(
                        f"{len(self._buffer)} readings not acknowledged after {timeout_s} s: {e.code()}"
                    ) from e
                time.sleep(retry)
                retry = min(retry * 2, self.retry_max_s)
        return self._stored_up_to

    @property
    def pending(self) -> int:
        """Readings kept and not yet acknowledged."""
        return len(self._buffer)

    # -- the wire -----------------------------------------------------------

    def _channel(self) -> grpc.Channel:
        if self._credentials is not None:
            return grpc.secure_channel(self.address, self._credentials)
        return grpc.insecure_channel(self.address)

    def _resume_point(self) -> int:
        with self._channel() as channel:
            stub = ingest_pb2_grpc.IngestServiceStub(channel)
            answer = stub.GetResumePoint(
                ingest_pb2.GetResumePointRequest(channel_id=self.channel_id),
                metadata=self._metadata,
                timeout=10,
            )
        return answer.last_stored_seq if answer.any_stored else 0

    def _trim(self, up_to: int) -> None:
        while self._buffer and self._buffer[0].seq <= up_to:
            self._buffer.popleft()
        self._stored_up_to = max(self._stored_up_to, up_to)

    def _send_all(self) -> None:
        """One stream: resume, then every kept reading, batch by batch."""
        self._trim(self._resume_point())
        batches = [
            list(self._buffer)[i : i + self.batch_size]
            for i in range(0, len(self._buffer), self.batch_size)
        ]
        if not batches:
            return
        outbound: "queue.Queue[Optional[ingest_pb2.StreamReadingsRequest]]" = queue.Queue()
        for batch in batches:
            outbound.put(
                ingest_pb2.StreamReadingsRequest(
                    batch=ingest_pb2.ReadingBatch(
                        channel_id=self.channel_id, batch_id=batch[-1].seq, readings=batch
                    )
                )
            )
        outbound.put(None)
        with self._channel() as channel:
            stub = ingest_pb2_grpc.IngestServiceStub(channel)
            acks = stub.StreamReadings(iter(outbound.get, None), metadata=self._metadata)
            answered = 0
            for response in acks:
                ack = response.ack
                for r in ack.rejected:
                    self.refused.append(Refused(seq=r.seq, field=r.field, reason=r.reason))
                # Everything up to the batch's last seq is stored, a
                # duplicate or refused: none of it is sent again.
                self._trim(ack.batch_id)
                answered += 1
                if answered == len(batches):
                    break
