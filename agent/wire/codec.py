"""msgpack encoding of the halfcycle messages (schemas in ``schemas/*.schema.json``).

Layering:

- *body builders* (:func:`event_body`, :func:`aggregate_body`, :func:`status_body`,
  :func:`gap_body`, :func:`capture_bodies`; summaries come from
  :class:`agent.wire.records.SummaryBatcher`) turn domain objects into message dicts holding
  only msgpack-native values, without the device identity;
- :meth:`Identity.stamp` adds ``device``, ``site``, ``epoch`` and the outbox ``seq``;
- :func:`encode` validates and packs; :func:`decode` unpacks with hard limits and
  validates, so every failure is a :class:`WireError` with a reason;
- readers (:func:`summary_arrays`, :func:`event_from_message`, :func:`aggregate_from_message`,
  :class:`CaptureAssembler`) give back numpy arrays and domain objects.

Times are UTC seconds since the Unix epoch as float64 everywhere.
"""

from __future__ import annotations

import hashlib
import math
import time
from collections import OrderedDict
from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field
from typing import Any

import msgpack
import numpy as np
import numpy.typing as npt

from agent.events.types import Capture, Event, Thresholds
from agent.measurement.types import Aggregate
from agent.site import Site
from agent.wire.errors import WireError
from agent.wire.packing import unpack_values
from agent.wire.topics import check_id, parse_topic
from agent.wire.validate import validate

SCHEMA_VERSION = 1
# The version written per message type where it moved on (schemas/*.schema.json list the
# versions still read): event v2 adds ``dip_duration_s`` and rapid voltage changes (kind
# "rvc", delta_umax_v, delta_uss_v, rvc_threshold, rvc_hysteresis); status v2 adds
# ``last_stop`` and ``thd_max_order``; aggregate v2 adds the 10-min "harmonics" and "flicker".
SCHEMA_VERSIONS: dict[str, int] = {"event": 2, "status": 2, "aggregate": 2}
WRITE_VERSIONS = SCHEMA_VERSIONS
#: The ``reason`` of the offline status and retained presence a clean stop sends; the restart
#: after it reports ``last_stop = "planned"`` (agent.publish.edge, agent.store.outages).
PLANNED_STOP = "planned_stop"
HARMONIC_EXP = -4          # individual harmonics travel in units of 0.01 % of the fundamental
F64 = npt.NDArray[np.float64]

# Largest message decode() accepts by default [bytes]; capture chunks are bounded by the MQTT
# maximum packet size below, everything else is a few kB.
DEFAULT_MAX_MESSAGE_BYTES = 1 << 20
# Default MQTT maximum packet size for capture chunking [bytes]. Brokers and small clients
# often cap packets at tens of kB; 32 KiB keeps a default capture (2 ch, 30 cycles at
# 7680 S/s, 18 kB) in one packet.
DEFAULT_MAX_PACKET = 32768
# MQTT 5 PUBLISH overhead besides topic and payload (MQTT 5.0 cl. 3.3): 1 byte packet
# type/flags, up to 4 bytes remaining length, 2 bytes packet identifier (QoS 1).
MQTT_FIXED_OVERHEAD = 1 + 4 + 2
# Budget for the property length and any properties the publisher adds (message expiry
# 5 B, payload format 2 B, content type, a user property or two) [bytes]. Stated margin.
MQTT_PROPERTIES_MARGIN = 64
_WORST_SEQ = 2**53 - 1


@dataclass(frozen=True)
class Identity:
    """Who sends: ``site``, ``device`` and the outbox ``epoch`` (changes when the outbox is
    recreated). A message is identified by (device, epoch, seq)."""

    site: str
    device: str
    epoch: str

    def __post_init__(self) -> None:
        check_id(self.site, "site")
        check_id(self.device, "device")
        check_id(self.epoch, "epoch")

    def stamp(self, body: Mapping[str, Any], seq: int) -> dict[str, Any]:
        """``body`` with the identity and ``seq`` added (a new dict)."""
        if isinstance(seq, bool) or not isinstance(seq, int) or not 0 <= seq <= _WORST_SEQ:
            raise WireError(f"seq {seq!r} is not an integer in 0..2^53-1", "encode")
        msg = dict(body)
        msg.update(device=self.device, site=self.site, epoch=self.epoch, seq=seq)
        return msg


# --- generic encode / decode ------------------------------------------------------------

def encode(msg: Mapping[str, Any], *, check: bool = True) -> bytes:
    """Pack a message; with ``check`` (default) it is validated first."""
    if check:
        validate(dict(msg))
    try:
        packed: bytes = msgpack.packb(msg, use_bin_type=True, strict_types=False)
        return packed
    except (TypeError, ValueError, OverflowError) as exc:
        raise WireError(f"cannot pack message: {exc}", "encode") from None


def _no_ext(code: int, data: bytes) -> Any:
    raise WireError(f"msgpack extension type {code} is not allowed", "not_msgpack")


def unpack(data: bytes, *, max_bytes: int = DEFAULT_MAX_MESSAGE_BYTES) -> Any:
    """Unpack msgpack with limits, without schema validation. WireError on any failure."""
    if not isinstance(data, bytes | bytearray | memoryview):
        raise WireError(f"payload must be bytes, got {type(data).__name__}", "not_msgpack")
    if len(data) > max_bytes:
        raise WireError(f"payload of {len(data)} bytes exceeds {max_bytes}", "oversized")
    if len(data) == 0:
        raise WireError("empty payload", "not_msgpack")
    try:
        return msgpack.unpackb(
            bytes(data), raw=False, use_list=True, strict_map_key=True, ext_hook=_no_ext,
            max_bin_len=max_bytes, max_str_len=max_bytes, max_array_len=100_000,
            max_map_len=1_000, max_ext_len=0,
        )
    except WireError:
        raise
    except msgpack.ExtraData:
        raise WireError("trailing bytes after the message", "not_msgpack") from None
    except (ValueError, TypeError, msgpack.UnpackException, RecursionError) as exc:
        raise WireError(f"not msgpack: {type(exc).__name__}: {exc}"[:300], "not_msgpack") from None


def decode(data: bytes, *, max_bytes: int = DEFAULT_MAX_MESSAGE_BYTES) -> dict[str, Any]:
    """Unpack and validate one message; returns the message dict (packed arrays still packed:
    use :func:`summary_arrays` etc. for numpy values)."""
    msg = unpack(data, max_bytes=max_bytes)
    validate(msg)
    assert isinstance(msg, dict)
    return msg


def decode_from_topic(topic: str, data: bytes, *,
                      max_bytes: int = DEFAULT_MAX_MESSAGE_BYTES) -> dict[str, Any]:
    """:func:`decode` plus the checks a collector needs: the topic is ours, its kind is the
    message type, and the site/device in the payload are the topic's (the broker ACL ties
    a device to its topics, so a mismatch means a misconfigured or misbehaving sender)."""
    site, device, kind = parse_topic(topic)
    msg = decode(data, max_bytes=max_bytes)
    if msg["type"] != kind:
        raise WireError(f"a {msg['type']} message on a {kind} topic", "topic")
    if msg.get("site") != site or msg.get("device") != device:
        raise WireError(f"payload says {msg.get('site')}/{msg.get('device')}, topic says "
                        f"{site}/{device}", "topic")
    return msg


def _body(msg_type: str, /, **fields: Any) -> dict[str, Any]:
    return {"v": SCHEMA_VERSIONS.get(msg_type, SCHEMA_VERSION), "type": msg_type, **fields}


def _opt_float(x: float | None, what: str) -> float | None:
    """Optional float: None and NaN (= unknown) both travel as null."""
    if x is None:
        return None
    f = float(x)
    if math.isnan(f):
        return None
    if math.isinf(f):
        raise WireError(f"{what} is infinite", "non_finite")
    return f


def _req_float(x: float, what: str) -> float:
    f = float(x)
    if not math.isfinite(f):
        raise WireError(f"{what} is {f}, a finite number is required", "non_finite")
    return f


def _plain(x: Any) -> Any:
    """numpy scalars/arrays and tuples -> msgpack-native values (for free-form maps)."""
    if isinstance(x, np.generic):
        return x.item()
    if isinstance(x, np.ndarray):
        return [_plain(v) for v in x.tolist()]
    if isinstance(x, list | tuple):
        return [_plain(v) for v in x]
    if isinstance(x, Mapping):
        return {str(k): _plain(v) for k, v in x.items()}
    return x


# --- summary ----------------------------------------------------------------------------

@dataclass
class SummaryArrays:
    """A decoded summary. Arrays have one row per second; per-channel arrays shape (n, ch).
    NaN marks a second (or a quantity) without a value; ``present`` is False for seconds
    without a record (their ``flags`` read 0)."""

    t0: float
    period_s: float
    channels: tuple[str, ...]
    t: F64
    rms_min: F64
    rms_mean: F64
    rms_max: F64
    thd: F64
    hz: F64
    imbalance: F64
    flags: npt.NDArray[np.int64]
    present: npt.NDArray[np.bool_]


def summary_arrays(msg: Mapping[str, Any]) -> SummaryArrays:
    """numpy arrays of a validated summary message [V, Hz, fraction]."""
    n = int(msg["n"])
    nch = len(msg["channels"])

    def per_channel(name: str) -> F64:
        out = np.full((n, nch), np.nan)
        for i, packed in enumerate(msg[name]):
            if packed is not None:
                out[:, i] = unpack_values(packed, n)
        return out

    def single(name: str) -> F64:
        packed = msg[name]
        return np.full(n, np.nan) if packed is None else unpack_values(packed, n)

    flags_f = single("flags")
    present = ~np.isnan(flags_f)
    flags = np.where(present, flags_f, 0).astype(np.int64)
    t0, period = float(msg["t0"]), float(msg["period_s"])
    return SummaryArrays(
        t0=t0, period_s=period, channels=tuple(msg["channels"]),
        t=t0 + period * np.arange(n, dtype=np.float64), rms_min=per_channel("rms_min"),
        rms_mean=per_channel("rms_mean"), rms_max=per_channel("rms_max"),
        thd=per_channel("thd"), hz=single("hz"), imbalance=single("imbalance"),
        flags=flags, present=present,
    )


# --- aggregate --------------------------------------------------------------------------

def aggregate_body(agg: Aggregate, channels: Iterable[str]) -> dict[str, Any]:
    """A measurement :class:`Aggregate` as a message body (NaN per-channel values -> null)."""
    body = _body(
        "aggregate", kind=agg.kind, t=_req_float(agg.t_utc, "t_utc"),
        duration_s=_req_float(agg.duration_s, "duration_s"), channels=list(channels),
        rms=[_opt_float(x, "rms") for x in agg.rms], thd=[_opt_float(x, "thd") for x in agg.thd],
        hz=_opt_float(agg.hz, "hz"), flagged=bool(agg.flagged), count=int(agg.count),
    )
    if agg.harmonics:
        body["harmonics"] = harmonics_field(agg.harmonics)
    if agg.pst:
        fl: dict[str, Any] = {"pst": [_opt_float(x, "pst") for x in agg.pst],
                              "flagged": bool(agg.flicker_flagged)}
        if agg.plt is not None:
            fl["plt"] = [_opt_float(x, "plt") for x in agg.plt]
        # The lamp model is configuration (120V below 180 V declared): not repeated on every
        # aggregate, to keep a three-phase monitor inside 1.5 MB/day.
        body["flicker"] = fl
    return body


def harmonics_field(per_channel: Iterable[Iterable[float]]) -> dict[str, Any]:
    """Per-channel h2.. ratios [fraction] as compact integers of 10^HARMONIC_EXP (NaN -> null)."""
    unit = 10.0 ** HARMONIC_EXP
    values: list[list[int | None] | None] = []
    for row in per_channel:
        q = [None if not math.isfinite(v) else round(v / unit) for v in row]
        values.append(None if all(x is None for x in q) else q)
    return {"first": 2, "exp": HARMONIC_EXP, "values": values}


def harmonics_from_field(field: Mapping[str, Any] | None) -> tuple[tuple[float, ...], ...]:
    """Inverse of :func:`harmonics_field`: per channel h2.. [fraction], NaN for null."""
    if not field:
        return ()
    unit = 10.0 ** int(field["exp"])
    return tuple(() if row is None else tuple(math.nan if x is None else x * unit for x in row)
                 for row in field["values"])


def aggregate_from_message(msg: Mapping[str, Any]) -> Aggregate:
    """The :class:`Aggregate` of a validated message; null values come back as NaN."""
    def f(x: Any) -> float:
        return math.nan if x is None else float(x)
    return Aggregate(
        kind=msg["kind"], t_utc=float(msg["t"]), duration_s=float(msg["duration_s"]),
        rms=tuple(f(x) for x in msg["rms"]), thd=tuple(f(x) for x in msg["thd"]),
        hz=None if msg["hz"] is None else float(msg["hz"]), flagged=bool(msg["flagged"]),
        count=int(msg["count"]), harmonics=harmonics_from_field(msg.get("harmonics")),
        **_flicker_from_field(msg.get("flicker")),
    )


def _flicker_from_field(field: Mapping[str, Any] | None) -> dict[str, Any]:
    if not field:
        return {}
    def f(x: Any) -> float:
        return math.nan if x is None else float(x)
    plt = field.get("plt")
    return {"pst": tuple(f(x) for x in field["pst"]),
            "plt": None if plt is None else tuple(f(x) for x in plt),
            "flicker_flagged": bool(field["flagged"]), "lamp": str(field.get("lamp", ""))}


# --- event ------------------------------------------------------------------------------

def event_body(
    event: Event,
    change: str,
    *,
    channel_names: Iterable[str] | None = None,
    classifier_version: str | None = None,
) -> dict[str, Any]:
    """An :class:`Event` as a message body. ``change`` is ``started`` or ``ended`` (as in
    :class:`agent.events.types.EventUpdate`). ``classifier_version`` defaults to the
    classification's own ``classifier_version`` entry if it has one."""
    if classifier_version is None and event.classification:
        cv = event.classification.get("classifier_version")
        classifier_version = str(cv) if cv is not None else None
    end_utc = _opt_float(event.end_utc, "end_utc")
    start_utc = _req_float(event.start_utc, "start_utc")
    body = _body(
        "event", event_id=event.event_id, change=change, kind=event.kind,
        channels=[int(c) for c in event.channels],
        start_utc=start_utc, end_utc=end_utc,
        duration_s=None if end_utc is None else end_utc - start_utc,
        level_v=_req_float(event.level_v, "level_v"),
        level_pu=_req_float(event.level_pu, "level_pu"),
        nominal_v=_req_float(event.nominal_v, "nominal_v"),
        per_channel_level_v=[_req_float(x, "per_channel_level_v")
                             for x in event.per_channel_level_v],
        enclosing_duration_s=_opt_float(event.enclosing_duration_s, "enclosing_duration_s"),
        enclosing_level_v=_opt_float(event.enclosing_level_v, "enclosing_level_v"),
        enclosing_start_utc=_opt_float(event.enclosing_start_utc, "enclosing_start_utc"),
        dip_duration_s=_opt_float(event.dip_duration_s, "dip_duration_s"),
        partial_outage=bool(event.partial_outage),
        sag_energy_s=_opt_float(event.sag_energy_s, "sag_energy_s"),
        ended_by=event.ended_by,
        end_uncertainty_s=_opt_float(event.end_uncertainty_s, "end_uncertainty_s"),
        sync={"state": event.sync_state, "error_s": _opt_float(event.time_error_s, "time_error_s")},
        thresholds={k: _req_float(v, f"thresholds.{k}")
                    for k, v in event.thresholds.as_dict().items()},
        measurement={"start_index": _req_float(event.start, "start"),
                     "end_index": _opt_float(event.end, "end")},
        classification=None if event.classification is None else _plain(event.classification),
        classifier_version=classifier_version,
    )
    if event.kind == "rvc":
        body["delta_umax_v"] = _req_float(event.delta_umax_v or 0.0, "delta_umax_v")
        body["delta_uss_v"] = _req_float(event.delta_uss_v or 0.0, "delta_uss_v")
        body["rvc_threshold"] = _opt_float(event.rvc_threshold, "rvc_threshold")
        body["rvc_hysteresis"] = _opt_float(event.rvc_hysteresis, "rvc_hysteresis")
    if channel_names is not None:
        body["channel_names"] = list(channel_names)
    return body


@dataclass
class EventMessage:
    """A decoded event message."""

    event: Event
    change: str
    classifier_version: str | None
    channel_names: tuple[str, ...] | None
    identity: dict[str, Any] = field(default_factory=dict)


def event_from_message(msg: Mapping[str, Any]) -> EventMessage:
    """Rebuild the :class:`Event` of a validated event message."""
    th = msg["thresholds"]
    m = msg["measurement"]
    def opt(x: Any) -> float | None:
        return None if x is None else float(x)
    event = Event(
        event_id=msg["event_id"], kind=msg["kind"], channels=tuple(int(c) for c in msg["channels"]),
        start=float(m["start_index"]), start_utc=float(msg["start_utc"]),
        nominal_v=float(msg["nominal_v"]),
        thresholds=Thresholds(dip=float(th["dip"]), swell=float(th["swell"]),
                              interruption=float(th["interruption"]),
                              hysteresis=float(th["hysteresis"])),
        level_v=float(msg["level_v"]), end=opt(m["end_index"]), end_utc=opt(msg["end_utc"]),
        per_channel_level_v=tuple(float(x) for x in msg["per_channel_level_v"]),
        enclosing_duration_s=opt(msg["enclosing_duration_s"]),
        enclosing_level_v=opt(msg["enclosing_level_v"]),
        enclosing_start_utc=opt(msg["enclosing_start_utc"]),
        partial_outage=bool(msg["partial_outage"]), sag_energy_s=opt(msg["sag_energy_s"]),
        ended_by=msg["ended_by"], end_uncertainty_s=opt(msg["end_uncertainty_s"]),
        time_error_s=opt(msg["sync"]["error_s"]), sync_state=msg["sync"]["state"],
        classification=None if msg["classification"] is None else dict(msg["classification"]),
        delta_umax_v=opt(msg.get("delta_umax_v")), delta_uss_v=opt(msg.get("delta_uss_v")),
        rvc_threshold=opt(msg.get("rvc_threshold")),
        rvc_hysteresis=opt(msg.get("rvc_hysteresis")),
    )
    names = msg.get("channel_names")
    return EventMessage(
        event=event, change=msg["change"], classifier_version=msg["classifier_version"],
        channel_names=None if names is None else tuple(names),
        identity={k: msg[k] for k in ("device", "site", "epoch", "seq") if k in msg},
    )


# --- status, gap, ack -------------------------------------------------------------------

def status_body(
    state: str,
    *,
    agent_version: str,
    uptime_s: float,
    outbox_depth: int,
    sync: str,
    time_error_s: float | None,
    last_ran: float | None = None,
    t: float | None = None,
    reason: str | None = None,
    outbox_lanes: Mapping[str, int] | None = None,
    site_model: Mapping[str, Any] | None = None,
    last_stop: str | None = None,
    thd_max_order: int | None = None,
) -> dict[str, Any]:
    """``state`` is online, offline or heartbeat; ``last_ran`` the UTC time the agent last ran
    before this start (restart reports); ``t`` defaults to now; ``site_model`` the device's
    :class:`agent.site.Site` fields (see :func:`site_model_body`); ``last_stop`` how that run
    ended (``planned``: a clean stop, ``unplanned``: anything else); ``thd_max_order`` the
    highest harmonic order the device's THD covers (below 40 when the sample rate caps it)."""
    body = _body(
        "status", state=state, t=_req_float(time.time() if t is None else t, "t"),
        agent_version=agent_version, uptime_s=_req_float(uptime_s, "uptime_s"),
        last_ran=_opt_float(last_ran, "last_ran"), outbox_depth=int(outbox_depth),
        clock={"sync": sync, "error_s": _opt_float(time_error_s, "time_error_s")},
    )
    if reason is not None:
        body["reason"] = reason
    if outbox_lanes is not None:
        body["outbox_lanes"] = {str(k): int(v) for k, v in outbox_lanes.items()}
    if site_model is not None:
        body["site_model"] = dict(site_model)
    if last_stop is not None:
        body["last_stop"] = last_stop
    if thd_max_order is not None:
        body["thd_max_order"] = int(thd_max_order)
    return body


def site_model_body(site: Site) -> dict[str, Any]:
    """The site-model part of an online status message."""
    return {
        "nominal_v": float(site.nominal_v), "nominal_hz": float(site.nominal_hz),
        "service_type": site.service_type, "channel_names": list(site.channel_names),
        "measurement_point": site.measurement_point, "feeder": site.feeder,
        "transformer": site.transformer, "labels": dict(site.labels),
    }


def gap_body(lane: str, first_seq: int, last_seq: int, count: int, reason: str,
             t: float | None = None) -> dict[str, Any]:
    """Notice that ``count`` messages in ``first_seq..last_seq`` of ``lane`` were dropped."""
    return _body("gap", lane=lane, first_seq=int(first_seq), last_seq=int(last_seq),
                 count=int(count), reason=reason,
                 t=_req_float(time.time() if t is None else t, "t"))


def ack_message(site: str, device: str, epoch: str, seq: int, collector: str,
                t: float | None = None) -> dict[str, Any]:
    """The collector's retained acknowledgement: all of (device, epoch) up to ``seq`` is
    committed. (Not stamped: the collector is not a device.)"""
    return _body("ack", device=device, site=site, epoch=epoch, seq=int(seq), collector=collector,
                 t=_req_float(time.time() if t is None else t, "t"))


# --- captures ---------------------------------------------------------------------------

def capture_payload(capture: Capture) -> bytes:
    """Raw counts as little-endian int16, row-major (samples, channels)."""
    counts = np.asarray(capture.counts)
    if counts.dtype != np.int16 or counts.ndim != 2:
        raise WireError(f"capture counts must be 2-D int16, got {counts.dtype} {counts.shape}",
                        "encode")
    return np.ascontiguousarray(counts, dtype="<i2").tobytes()


def _capture_meta(capture: Capture) -> dict[str, Any]:
    counts = np.asarray(capture.counts)
    scale = np.asarray(capture.scale, dtype=np.float64).ravel()
    if scale.shape[0] != counts.shape[1] or len(capture.channel_names) != counts.shape[1]:
        raise WireError("capture scale/channel_names do not match the counts' channels", "encode")
    meta: dict[str, Any] = {
        "dtype": "<i2", "samples": int(counts.shape[0]), "channels": list(capture.channel_names),
        "scale": [_req_float(s, "scale") for s in scale],
        "sample_rate": _req_float(capture.sample_rate, "sample_rate"),
        "first_index": int(capture.first_index), "trigger_index": int(capture.trigger_index),
        "trigger_utc": _req_float(capture.trigger_utc, "trigger_utc"),
        "pre_cycles": int(capture.pre_cycles), "post_cycles": int(capture.post_cycles),
    }
    if capture.meta:
        meta["extra"] = _plain(capture.meta)
    return meta


def publish_packet_size(topic_len: int, payload_len: int, properties_len: int = 0,
                        qos: int = 1) -> int:
    """Exact MQTT 5 PUBLISH packet size [bytes] (MQTT 5.0 cl. 3.3): fixed header with its
    variable-length remaining length, topic (2-byte length prefix), packet id for QoS > 0,
    property length varint plus properties, payload."""
    remaining = 2 + topic_len + (2 if qos > 0 else 0) + _varint_len(properties_len) \
        + properties_len + payload_len
    return 1 + _varint_len(remaining) + remaining


def _varint_len(n: int) -> int:
    return 1 if n < 128 else 2 if n < 16384 else 3 if n < 2097152 else 4


def chunk_data_limit(max_packet: int, topic: str, envelope_len: int) -> int:
    """Payload bytes per chunk so that the whole PUBLISH stays within ``max_packet`` with
    :data:`MQTT_PROPERTIES_MARGIN` bytes left for properties. ``envelope_len`` is the msgpack
    size of a chunk message with empty data and worst-case integers."""
    overhead = MQTT_FIXED_OVERHEAD + 2 + len(topic.encode("utf-8")) + MQTT_PROPERTIES_MARGIN
    # +3: a bin32 header is 5 bytes where the empty bin8 in the envelope took 2.
    room = max_packet - overhead - envelope_len - 3
    if room < 64:
        raise WireError(f"max packet size {max_packet} leaves {room} bytes per capture chunk",
                        "encode")
    return room


def capture_bodies(capture: Capture, *, topic: str, max_packet: int = DEFAULT_MAX_PACKET,
                   clock: Mapping[str, Any] | None = None) -> list[dict[str, Any]]:
    """Split a capture into chunk bodies whose PUBLISH packets (on ``topic``, once stamped
    with any seq) stay within ``max_packet`` bytes, leaving the stated properties margin.
    ``clock`` (``{"sync": ..., "error_s": ...}``) is repeated in every chunk."""
    payload = capture_payload(capture)
    digest = hashlib.sha256(payload).hexdigest()
    meta = _capture_meta(capture)

    def body(index: int, total: int, data: bytes) -> dict[str, Any]:
        b = _body("capture", capture_id=capture.capture_id, event_id=capture.event_id,
                  trigger=capture.trigger, index=index, total=total, size=len(payload),
                  sha256=digest, data=data, meta=meta)
        if clock is not None:
            b["clock"] = dict(clock)
        return b

    worst = Identity("x" * 64, "x" * 64, "x" * 64).stamp(body(99999, 100000, b""), _WORST_SEQ)
    envelope = len(msgpack.packb(worst, use_bin_type=True))
    per_chunk = chunk_data_limit(max_packet, topic, envelope)
    total = max(1, -(-len(payload) // per_chunk))
    if total > 100000:
        raise WireError(f"capture needs {total} chunks, more than 100000", "encode")
    return [body(i, total, payload[i * per_chunk:(i + 1) * per_chunk]) for i in range(total)]


@dataclass
class _Pending:
    first: dict[str, Any]
    chunks: dict[int, bytes] = field(default_factory=dict)
    received_at: float = 0.0


class CaptureAssembler:
    """Reassembles capture chunks (any order; exact duplicates are ignored) and verifies the
    SHA-256 of the whole payload before returning a :class:`Capture` with bit-exact counts.

    A chunk that disagrees with earlier chunks of the same capture (metadata, or different
    bytes for an index already held) raises WireError and is not stored. ``max_pending``
    bounds memory: when exceeded, the oldest incomplete capture is dropped and its id
    appended to :attr:`dropped` (so the caller can report it: nothing goes silently). Late
    redeliveries of a capture completed recently (the last ``remember`` ones) are ignored.
    """

    _KEYS = ("event_id", "trigger", "total", "size", "sha256", "meta")

    def __init__(self, max_pending: int = 64, remember: int = 1024) -> None:
        self.max_pending = max_pending
        self._pending: dict[tuple[str, str, str], _Pending] = {}
        self._completed: OrderedDict[tuple[str, str, str], None] = OrderedDict()
        self._remember = remember
        self.dropped: list[tuple[str, str, str]] = []

    @staticmethod
    def key(msg: Mapping[str, Any]) -> tuple[str, str, str]:
        return (str(msg.get("device", "")), str(msg.get("epoch", "")), str(msg["capture_id"]))

    def pending(self) -> list[tuple[tuple[str, str, str], int, int]]:
        """(key, chunks held, total) of every incomplete capture."""
        return [(k, len(p.chunks), int(p.first["total"])) for k, p in self._pending.items()]

    def expire(self, older_than: float) -> list[tuple[str, str, str]]:
        """Drop incomplete captures whose first chunk arrived before ``older_than`` [s, the
        clock passed to :meth:`add`]; returns their keys (also appended to :attr:`dropped`)."""
        stale = [k for k, p in self._pending.items() if p.received_at < older_than]
        for k in stale:
            del self._pending[k]
        self.dropped.extend(stale)
        return stale

    def add(self, msg: Mapping[str, Any], now: float | None = None) -> Capture | None:
        """Add one validated chunk message; the Capture once the last chunk arrived."""
        if msg.get("type") != "capture":
            raise WireError("not a capture chunk", "capture")
        key = self.key(msg)
        if key in self._completed:
            return None  # at-least-once delivery: a late copy of a finished capture
        entry = self._pending.get(key)
        if entry is None:
            entry = _Pending(first=dict(msg), received_at=time.time() if now is None else now)
            self._pending[key] = entry
            while len(self._pending) > self.max_pending:
                oldest = next(iter(self._pending))
                del self._pending[oldest]
                self.dropped.append(oldest)
        else:
            for k in self._KEYS:
                if msg[k] != entry.first[k]:
                    raise WireError(f"capture {key[2]}: chunk {msg['index']} disagrees on {k}",
                                    "capture")
        index, data = int(msg["index"]), bytes(msg["data"])
        held = entry.chunks.get(index)
        if held is not None:
            if held != data:
                raise WireError(f"capture {key[2]}: chunk {index} arrived twice with different "
                                "bytes", "capture")
            return None
        entry.chunks[index] = data
        if len(entry.chunks) < int(entry.first["total"]):
            return None
        del self._pending[key]
        self._completed[key] = None
        while len(self._completed) > self._remember:
            self._completed.popitem(last=False)
        payload = b"".join(entry.chunks[i] for i in range(int(entry.first["total"])))
        first = entry.first
        if len(payload) != first["size"]:
            raise WireError(f"capture {key[2]}: {len(payload)} bytes, expected {first['size']}",
                            "capture")
        if hashlib.sha256(payload).hexdigest() != first["sha256"]:
            raise WireError(f"capture {key[2]}: sha256 mismatch; capture discarded", "capture")
        meta = first["meta"]
        counts = np.frombuffer(payload, dtype="<i2").astype(np.int16).reshape(
            int(meta["samples"]), len(meta["channels"]))
        return Capture(
            capture_id=first["capture_id"], event_id=first["event_id"], trigger=first["trigger"],
            first_index=int(meta["first_index"]), trigger_index=int(meta["trigger_index"]),
            trigger_utc=float(meta["trigger_utc"]), sample_rate=float(meta["sample_rate"]),
            channel_names=tuple(meta["channels"]),
            scale=np.asarray(meta["scale"], dtype=np.float64), counts=counts,
            pre_cycles=int(meta["pre_cycles"]), post_cycles=int(meta["post_cycles"]),
            meta=dict(meta.get("extra", {})),
        )
