"""Admission of incoming ADC frames: every decoded message checked against one sensor (pure, no
sockets), and the source's (run, seq) tracked: repeated frames rejected, gaps and restarts counted.
Used by serve's receiver, the recorder and the adapter."""

from __future__ import annotations

import numpy as np

from .sensor import Sensor
from .wire import Message, WireError


class AdcValidator:
    """Checks decoded messages against one sensor and tracks (run, seq). Not thread-safe: one per
    receiver. Accepted: the sensor's ADC format (raw dtype and shape) or canonical complex64."""

    def __init__(self, sensor: Sensor):
        self.sensor = sensor
        self.raw_dtype = sensor.adc.raw_dtype().str
        self.raw_shape = sensor.adc.raw_shape(sensor.chirps_per_frame, sensor.n_rx, sensor.samples_per_chirp)
        self.canonical_shape = (sensor.chirps_per_frame, sensor.n_rx, sensor.samples_per_chirp)
        self.max_payload_bytes = max(int(np.prod(self.raw_shape)) * sensor.adc.raw_dtype().itemsize,
                                     int(np.prod(self.canonical_shape)) * 8)
        self.run: str | None = None
        self.last_seq = -1
        self.sequence_gaps = 0
        self.source_restarts = 0

    def check(self, msg: Message) -> int:
        """Raise WireError if `msg` is not an acceptable frame; otherwise update the sequence tracking
        and return the number of frames missing just before it (a gap)."""
        s = self.sensor
        if msg.kind != "adc":
            raise WireError("malformed", f"kind '{msg.kind}' on the input bus; serve accepts 'adc' messages only")
        if msg.sensor_id != s.sensor_id:
            raise WireError("unknown_sensor", f"adc header field 'sensor_id' = {msg.sensor_id!r}: this daemon "
                                              f"serves sensor {s.sensor_id!r}")
        h = msg.header
        if h["digest"] != s.digest:
            raise WireError("digest", f"adc header field 'digest' = {h['digest']!r}: the daemon's description of "
                                      f"'{s.sensor_id}' has digest {s.digest!r} (the source uses another "
                                      "sensor description)")
        if h["dtype"] not in (self.raw_dtype, "<c8"):
            raise WireError("dtype", f"adc header field 'dtype' = {h['dtype']!r}: sensor '{s.sensor_id}' sends "
                                     f"{self.raw_dtype!r} (or canonical '<c8')")
        expected = self.raw_shape if h["dtype"] == self.raw_dtype else self.canonical_shape
        if tuple(h["shape"]) != tuple(expected):
            raise WireError("shape", f"adc header field 'shape' = {list(h['shape'])}: dtype {h['dtype']} frames "
                                     f"of sensor '{s.sensor_id}' have shape {list(expected)}")
        run, seq = h["run"], h["seq"]
        gap = 0
        if run != self.run:
            if self.run is not None:
                self.source_restarts += 1
            self.run = run
        elif seq <= self.last_seq:
            raise WireError("repeated", f"adc header field 'seq' = {seq}: not after the last accepted frame "
                                        f"{self.last_seq} of run {run!r}")
        else:
            gap = seq - self.last_seq - 1
            self.sequence_gaps += gap
        self.last_seq = seq
        return gap
