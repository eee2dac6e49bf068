"""MQTT payloads -> samples: the decoder and the reasons it refuses a message for.

``payload = "number"``: the UTF-8 text of a decimal number, stamped with the arrival
time. ``payload = "json"``: an object with the value, the source time and the quality at
dotted paths (:class:`PayloadDecoder`).

**Several samples in one message.** A JSON payload may carry a tag's samples of a short
while at once (a gateway that buffers, or a fast tag): the value at ``value_path`` is then
an array, the time at ``time_path`` an array of the same length (required: samples of one
message cannot share an arrival time), and the quality one value for all or an array of
the same length. Each element is judged as a single sample would be; a non-finite element
is a bad-quality sample, counted; a wrong element type, a length that differs, an empty
or too long array (more than ``MAX_SAMPLES``) refuses the whole message. One message per
sample costs the broker client about 45 us of Python each (paho), so a tag at a few hundred
hertz is best published this way.

**Bad input.** A message that cannot become a sample raises :class:`MalformedPayload`
with a short reason, which the connector counts per topic and logs (rate-limited); a NaN
or infinite value is delivered as a bad-quality sample *and* counted. Reasons:
``payload too large``, ``not UTF-8``, ``not a number``, ``not JSON``,
``not a JSON object``, ``missing value``, ``wrong value type``, ``non-finite value``,
``missing time``, ``wrong time type``, ``bad time``, ``time without offset``,
``non-finite time``, ``bad quality``; for arrays also ``empty array``, ``array too long``,
``array lengths differ``, ``array without times`` (and, from the connector, ``unknown topic``).

**Sequence numbers.** With ``seq_path``, a JSON payload may carry its publisher's sequence
number for the topic (an integer from 0); :attr:`PayloadDecoder.seq` holds that of the
message decoded last (None: absent), and :attr:`PayloadDecoder.seq_bad` tells that one was
there but is no such integer (the sample is still good; the connector counts ``bad
sequence number``).
"""

from __future__ import annotations

import json
import math
from collections.abc import Sequence
from datetime import datetime
from typing import Any

from spanwatch.connectors.mqtt.settings import MqttSettings
from spanwatch.rules.samples import QUALITY_CODES


class MalformedPayload(ValueError):
    """A message that cannot become a sample; ``reason`` is the short text it is counted under."""

    def __init__(self, reason: str) -> None:
        super().__init__(reason)
        self.reason = reason


_MISSING = object()


def _get(doc: dict[str, Any], parts: Sequence[str]) -> Any:
    """Follow a dotted path (split into ``parts``) through objects and list indices; ``_MISSING`` if absent."""
    if len(parts) == 1:
        return doc.get(parts[0], _MISSING)
    cur: Any = doc
    for p in parts:
        if type(cur) is dict:
            cur = cur.get(p, _MISSING)
            if cur is _MISSING:
                return _MISSING
        elif type(cur) is list and p.isdigit() and int(p) < len(cur):
            cur = cur[int(p)]
        else:
            return _MISSING
    return cur


_BAD = QUALITY_CODES["bad"]
MAX_SAMPLES = 100_000  # samples in one message at most

Decoded = tuple[float, float, int, bool, str | None]  # (t, value, quality, used_arrival_time, problem)


class PayloadDecoder:
    """Payload bytes -> ``(t, value, quality, used_arrival_time, problem)`` or :class:`MalformedPayload`.

    ``payload = "number"``: the UTF-8 text of a decimal number (``"12.5"``, ``"-3e2"``;
    Python's digit-group underscores are refused); the timestamp is the arrival time.
    ``payload = "json"``: an object; ``value_path``, ``time_path``, ``quality_path`` are
    dotted paths; time in ``time_unit`` (``s`` / ``ms`` since the epoch, ``iso``: ISO 8601
    with a UTC offset); quality ``good`` / ``uncertain`` / ``bad`` or 0 / 1 / 2, missing
    means good; without ``time_path`` the arrival time is used. A NaN or infinite value
    comes back as a bad-quality sample with ``problem = "non-finite value"``.
    """

    def __init__(self, spec: MqttSettings) -> None:
        self.json = spec.payload == "json"
        self.max_payload = spec.max_payload
        self.value_path = tuple(spec.value_path.split("."))
        self.time_path = tuple(spec.time_path.split(".")) if spec.time_path else None
        self.quality_path = tuple(spec.quality_path.split(".")) if spec.quality_path else None
        self.seq_path = tuple(spec.seq_path.split(".")) if spec.seq_path else None
        self.seq: int | None = None
        self.seq_bad = False
        self.time_unit = spec.time_unit
        self.ms = spec.time_unit == "ms"

    def decode(self, payload: bytes, arrival: float) -> Decoded:
        """The one sample of a message (a message carrying an array is refused here: see :meth:`decode_many`)."""
        out = self.decode_many(payload, arrival)
        if len(out) != 1:
            raise MalformedPayload("several samples")
        return out[0]

    def decode_many(self, payload: bytes, arrival: float) -> list[Decoded]:
        """The samples of a message: one, or those of its arrays (see the module docstring)."""
        if len(payload) > self.max_payload:
            raise MalformedPayload("payload too large")
        try:
            text = payload.decode("utf-8")
        except UnicodeDecodeError:
            raise MalformedPayload("not UTF-8") from None
        if not self.json:
            if "_" in text or not text.isascii():  # Python also reads "1_000" and non-ASCII digits
                raise MalformedPayload("not a number")
            try:
                value = float(text)
            except ValueError:
                raise MalformedPayload("not a number") from None
            return [self._finish(arrival, value, 0, True)]
        try:
            doc = json.loads(text)
        except (ValueError, RecursionError):
            raise MalformedPayload("not JSON") from None
        if type(doc) is not dict:
            raise MalformedPayload("not a JSON object")
        if self.seq_path is not None:
            s = _get(doc, self.seq_path)
            self.seq_bad = s is not _MISSING and not (type(s) is int and 0 <= s < 1 << 63)
            self.seq = s if s is not _MISSING and not self.seq_bad else None
        raw = _get(doc, self.value_path)
        if raw is _MISSING:
            raise MalformedPayload("missing value")
        if type(raw) is list:
            return self._arrays(doc, raw)
        raw = self._number(raw)
        quality = 0
        if self.quality_path is not None:
            q = _get(doc, self.quality_path)
            if q is not _MISSING:
                quality = self._quality(q)
        if self.time_path is None:
            return [self._finish(arrival, raw, quality, True)]
        traw = _get(doc, self.time_path)
        if traw is _MISSING:
            raise MalformedPayload("missing time")
        return [self._finish(self._time(traw), raw, quality, False)]

    def _arrays(self, doc: dict[str, Any], values: list[Any]) -> list[Decoded]:
        """The samples of a message whose value is an array: times an array of the same length, quality one or
        an array. Every element is checked before any sample is returned: a bad one refuses the message."""
        n = len(values)
        if n == 0:
            raise MalformedPayload("empty array")
        if n > MAX_SAMPLES:
            raise MalformedPayload("array too long")
        if self.time_path is None:
            raise MalformedPayload("array without times")
        times = _get(doc, self.time_path)
        if times is _MISSING:
            raise MalformedPayload("missing time")
        if type(times) is not list:
            raise MalformedPayload("wrong time type")
        if len(times) != n:
            raise MalformedPayload("array lengths differ")
        quals: list[int]
        q = _MISSING if self.quality_path is None else _get(doc, self.quality_path)
        if q is _MISSING:
            quals = [0] * n
        elif type(q) is list:
            if len(q) != n:
                raise MalformedPayload("array lengths differ")
            quals = [self._quality(x) for x in q]
        else:
            quals = [self._quality(q)] * n
        number, when, finish = self._number, self._time, self._finish
        return [finish(when(t), number(v), qc, False) for v, t, qc in zip(values, times, quals, strict=True)]

    @staticmethod
    def _number(raw: Any) -> float:
        """A JSON number as a float (an integer beyond the float range as an infinity); else ``wrong value type``."""
        if type(raw) is float:
            return raw
        if type(raw) is not int:  # bool, str, list, object, null
            raise MalformedPayload("wrong value type")
        try:
            return float(raw)
        except OverflowError:  # an integer beyond the float range
            return math.inf if raw > 0 else -math.inf

    @staticmethod
    def _finish(t: float, value: float, quality: int, arrival: bool) -> Decoded:
        if value - value == 0.0:  # finite (NaN - NaN and inf - inf are NaN)
            return t, value, quality, arrival, None
        return t, value, _BAD, arrival, "non-finite value"

    @staticmethod
    def _quality(q: Any) -> int:
        if isinstance(q, str):
            code = QUALITY_CODES.get(q.strip().lower())
            if code is not None:
                return code
        elif type(q) in (int, float) and q in (0, 1, 2):
            return int(q)
        raise MalformedPayload("bad quality")

    def _time(self, raw: Any) -> float:
        if self.time_unit == "iso":
            if not isinstance(raw, str):
                raise MalformedPayload("wrong time type")
            try:
                dt = datetime.fromisoformat(raw)
            except ValueError:
                raise MalformedPayload("bad time") from None
            if dt.tzinfo is None or dt.utcoffset() is None:
                raise MalformedPayload("time without offset")
            try:
                return dt.timestamp()
            except (OverflowError, ValueError, OSError):
                raise MalformedPayload("bad time") from None
        if type(raw) is not float and type(raw) is not int:
            raise MalformedPayload("wrong time type")
        try:
            t = float(raw)
        except OverflowError:
            raise MalformedPayload("non-finite time") from None
        if self.ms:
            t /= 1000.0
        if t - t != 0.0:
            raise MalformedPayload("non-finite time")
        return t
