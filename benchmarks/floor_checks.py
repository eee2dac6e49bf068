"""The replay floor's computations: a recording read with pyarrow, aligned, checked and alarmed in plain numpy.

Used by ``benchmarks/replay_floor.py`` (see its docstring for what the floor does and does not do). Every
quantity is computed over the whole recording at once, every check kind over all its objects at once where its
objects share a formula (a frames x objects matrix), with the pure functions of ``spanwatch.rules``. The line is
read from the line model (``line.model``) and ``line.signals``, the lists of checks and alarm points as a
:class:`~spanwatch.monitor.pipeline.Pipeline` builds them (``spanwatch.monitor.checkset``; of a point the floor reads
kind, object, level, limit, direction and on-delay only), so the floor follows whatever the pipeline runs without
depending on the check classes' internals.
"""

from __future__ import annotations

import gzip
import itertools
import warnings
from dataclasses import dataclass, field

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.csv as pacsv
import pyarrow.parquet as pq
from spanwatch.monitor.line import Line
from spanwatch.rules.airfilm import combined_roughness, effective_cof
from spanwatch.rules.alarms import severity
from spanwatch.rules.base import LineState
from spanwatch.rules.drift.baseline import learn_baseline, standardise
from spanwatch.rules.drift.design import arl0_for, design_cusum
from spanwatch.rules.driftcheck import residual_of
from spanwatch.rules.linestate import classify_line_state
from spanwatch.rules.runout import rotation_frequency
from spanwatch.rules.slip import slip_ratio
from spanwatch.rules.span import draw_band, mean_ratio_uncertainty, steady_span_tension
from spanwatch.rules.traction import demonstrated_cof, traction_utilisation
from spanwatch.rules.woundroll import diameter_from_speed, local_slope

_QUALITY = {"good": 0, "uncertain": 1, "bad": 2, "0": 0, "1": 1, "2": 2, "": 0}
_STOPPED, _THREADING, _RUNNING = int(LineState.STOPPED), int(LineState.THREADING), int(LineState.RUNNING)
_PRODUCTION = (int(LineState.ACCELERATING), int(LineState.RUNNING), int(LineState.DECELERATING))
_MOVING = (int(LineState.THREADING), *_PRODUCTION)


# --- read and align ---------------------------------------------------------------------------


def read_fast(path: str, names: tuple[str, ...]) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """(t epoch s, tag column in ``names`` (-1 unknown), value, quality code) of every row: a Parquet recording
    (``.parquet``, the same columns) by pyarrow's Parquet reader, a CSV one by pyarrow's CSV reader, on one
    thread: the time parsed as a UTC timestamp (ISO 8601) or a float (epoch s), the tag and quality as
    dictionaries (their few distinct words mapped once), the value as float64."""
    if str(path).endswith(".parquet"):
        return _table_columns(pq.read_table(path, use_threads=False), names)
    opener = gzip.open if str(path).endswith(".gz") else open
    with opener(path, "rb") as f:
        first = f.readline()
        second = f.readline()
    t_field = second.split(b",", 1)[0].decode()
    try:
        float(t_field)
        t_type: pa.DataType = pa.float64()
    except ValueError:
        t_type = pa.timestamp("us", tz="UTC")
    columns = first.decode().strip().split(",")
    types = {"time": t_type, "tag": pa.dictionary(pa.int32(), pa.string()), "value": pa.float64()}
    if "quality" in columns:
        types["quality"] = pa.dictionary(pa.int32(), pa.string())
    table = pacsv.read_csv(path, read_options=pacsv.ReadOptions(use_threads=False, block_size=16 << 20),
                           convert_options=pacsv.ConvertOptions(column_types=types, strings_can_be_null=False))
    return _table_columns(table, names)


def _table_columns(table: pa.Table, names: tuple[str, ...]) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """The columns of a recording read as a table (CSV or Parquet): time as epoch s, tag and quality as codes."""
    tcol = table.column("time")
    if pa.types.is_timestamp(tcol.type):
        unit = {"s": 1.0, "ms": 1e-3, "us": 1e-6, "ns": 1e-9}[tcol.type.unit]
        t = pc.cast(tcol, pa.int64()).to_numpy() * unit
    else:
        t = pc.cast(tcol, pa.float64()).to_numpy()
    index = {n: i for i, n in enumerate(names)}

    def codes(col: pa.ChunkedArray, lut_of: object) -> np.ndarray:
        if not pa.types.is_dictionary(col.type):
            col = pc.dictionary_encode(col)
        parts = []
        for chunk in col.chunks:
            lut = np.array([lut_of(w) for w in chunk.dictionary.to_pylist()], dtype=np.int16)  # type: ignore[operator]
            if lut.size and (lut == lut[0]).all():  # one word in this chunk (quality "good" throughout)
                parts.append(np.full(len(chunk), lut[0], np.int16))
            else:
                parts.append(lut[chunk.indices.to_numpy(zero_copy_only=False)])
        return np.concatenate(parts) if parts else np.zeros(0, np.int16)

    tag = codes(table.column("tag"), lambda w: index.get(w, -1))
    value = pc.cast(table.column("value"), pa.float64()).to_numpy()
    if "quality" not in table.column_names:
        quality = np.zeros(t.size, np.int8)
    elif pa.types.is_integer(table.column("quality").type):
        quality = table.column("quality").to_numpy().astype(np.int8)
    else:
        quality = codes(table.column("quality"), lambda w: _QUALITY.get(str(w).strip().lower(), 2)).astype(np.int8)
    return t, tag, value, quality


@dataclass
class Frames:
    """The whole recording on the frame grid: times and (frames, tags) matrices of held SI value, quality, age."""

    t: np.ndarray
    value: np.ndarray
    quality: np.ndarray
    age: np.ndarray


def align(line: Line, names: tuple[str, ...], t: np.ndarray, tag: np.ndarray, value: np.ndarray,
          quality: np.ndarray) -> Frames:
    """Sample-and-hold of every tag onto the line's frame grid in one pass (``searchsorted`` per tag)."""
    rate = line.config.line.frame_rate
    keep = tag >= 0
    if not keep.all():
        t, tag, value, quality = t[keep], tag[keep], value[keep], quality[keep]
    grid = np.arange(np.ceil(t.min() * rate), np.floor(t.max() * rate) + 1) / rate
    small = tag.astype(np.int16, copy=False)
    order = np.argsort(small, kind="stable")  # radix sort on 16-bit codes; rows of a tag keep their time order
    bounds = np.searchsorted(small[order], np.arange(len(names) + 1))
    n, k = grid.size, len(names)
    # column-major: a tag's frames are contiguous (filled tag by tag, read tag by tag by the per-object checks)
    out_v = np.full((n, k), np.nan, order="F")
    out_q = np.full((n, k), 3, dtype=np.int8, order="F")
    out_a = np.full((n, k), np.inf, order="F")
    for c, name in enumerate(names):
        sel = order[bounds[c]:bounds[c + 1]]
        if sel.size == 0:
            continue
        ts = t[sel]
        if (np.diff(ts) < 0).any():
            sel = sel[np.argsort(ts, kind="stable")]
            ts = t[sel]
        info = line.tags[name]
        j = np.searchsorted(ts, grid, side="right") - 1
        has = j >= 0
        jj = np.maximum(j, 0)
        out_v[:, c] = np.where(has, value[sel][jj] * info.scale + info.offset, np.nan)
        out_q[:, c] = np.where(has, quality[sel][jj], 3)
        out_a[:, c] = np.where(has, grid - ts[jj], np.inf)
    return Frames(grid, out_v, out_q, out_a)


# --- small vectorised helpers ----------------------------------------------------------------


def ffill_index(mask: np.ndarray) -> np.ndarray:
    """Per row (along axis 0): the index of the last True at or before it, -1 before the first."""
    idx = np.where(mask, np.arange(mask.shape[0]).reshape((-1,) + (1,) * (mask.ndim - 1)), -1)
    return np.maximum.accumulate(idx, axis=0)


def rolling_mean(x: np.ndarray, ok: np.ndarray, w: int) -> tuple[np.ndarray, np.ndarray]:
    """Mean over the last ``w`` frames (differences of cumulative sums, by slices), usable where all ``w`` were
    usable; the first ``w - 1`` frames are not (the window is not full)."""
    c = np.cumsum(np.where(ok, x, 0.0), axis=0)
    b = np.cumsum(~ok, axis=0, dtype=np.int32)
    mean = np.full(x.shape, np.nan)
    full = np.zeros(x.shape, bool)
    if x.shape[0] >= w:
        mean[w - 1] = c[w - 1] / w
        mean[w:] = (c[w:] - c[:-w]) / w
        full[w - 1] = b[w - 1] == 0
        full[w:] = (b[w:] - b[:-w]) == 0
    return mean, full


def lagged(x: np.ndarray, w: int) -> np.ndarray:
    out = np.full_like(x, np.nan)
    out[w:] = x[:-w]
    return out


# --- signals, line state, roll changes -----------------------------------------------------------


@dataclass
class Context:
    t: np.ndarray
    sig: dict[str, tuple[np.ndarray, np.ndarray]]
    state: np.ndarray
    roll_start: dict[str, np.ndarray] = field(default_factory=dict)
    settling: dict[str, np.ndarray] = field(default_factory=dict)
    matrix: tuple[np.ndarray, np.ndarray, dict[str, int]] | None = None  # (values, usable, column of each signal)

    def m(self, names: list[str]) -> tuple[np.ndarray, np.ndarray]:
        """The named signals as (frames, len(names)) matrices of values and usable flags (one gather)."""
        if self.matrix is not None and all(n in self.matrix[2] for n in names):
            idx = [self.matrix[2][n] for n in names]
            return self.matrix[0][:, idx], self.matrix[1][:, idx]
        got = [self.s(n) for n in names]
        return np.stack([v for v, _ in got], axis=1), np.stack([o for _, o in got], axis=1)

    def s(self, name: str) -> tuple[np.ndarray, np.ndarray]:
        got = self.sig.get(name)
        if got is None:
            return np.full(self.t.size, np.nan), np.zeros(self.t.size, bool)
        return got

    def in_states(self, states: tuple[int, ...]) -> np.ndarray:
        return np.isin(self.state, states)


def context(line: Line, names: tuple[str, ...], fr: Frames) -> Context:
    col = {n: i for i, n in enumerate(names)}
    infos = [line.tags[n] for n in names]
    low, high = np.array([i.low for i in infos]), np.array([i.high for i in infos])
    stale = np.array([i.stale_after for i in infos])
    with np.errstate(invalid="ignore"):
        usable = (np.isfinite(fr.value) & (fr.quality == 0) & (fr.age <= stale) & (fr.value >= low)
                  & (fr.value <= high))
    specs = [sp for sp in line.signals if sp.tag in col]
    cols = [col[sp.tag] for sp in specs]
    values = np.asfortranarray(fr.value[:, cols] * np.array([sp.factor for sp in specs]))
    oks = np.asfortranarray(usable[:, cols])
    sig = {sp.name: (values[:, i], oks[:, i]) for i, sp in enumerate(specs)}
    for name in line.computed_signals:
        w = name.split("/", 1)[1]
        if f"rotation/{w}" in sig and "speed/web" in sig:
            (rot, okr), (v, okv) = sig[f"rotation/{w}"], sig["speed/web"]
            d = diameter_from_speed(v, rot)
            sig[name] = (d, okr & okv & np.isfinite(d))
    lw = line.config.line
    rate = lw.frame_rate
    v, ok = sig.get("speed/line", (np.full(fr.t.size, np.nan), np.zeros(fr.t.size, bool)))
    half = max(1, round(lw.accel_window * rate / 2))
    recent, ok_r = rolling_mean(v, ok, half)
    older, ok_o = lagged(recent, half), lagged(ok_r.astype(float), half) == 1.0
    accel = np.where(ok_r & ok_o, (recent - older) / (half / rate), 0.0)
    state = classify_line_state(np.where(ok, v, np.nan), accel, stop_speed=lw.stop_speed,
                                thread_speed=lw.thread_speed, accel_threshold=lw.accel_threshold)
    t = fr.t
    transient = (state == int(LineState.ACCELERATING)) | (state == int(LineState.DECELERATING))
    idx = ffill_index(transient)
    hold = (state == _RUNNING) & (idx >= 0) & (t - t[np.maximum(idx, 0)] < lw.settle_time)
    state = np.where(hold, state[np.maximum(idx, 0)], state).astype(np.int8)
    idx = ffill_index((state == _STOPPED) | (state == _THREADING))
    state[(state == _RUNNING) & (idx >= 0) & (t - t[np.maximum(idx, 0)] < lw.settle_time)] = \
        int(LineState.ACCELERATING)
    ctx = Context(t, sig, state, matrix=(values, oks, {sp.name: i for i, sp in enumerate(specs)}))
    for w in line.model.winders_in_path:
        d, okd = ctx.s(f"diameter/{w.id}")
        dd = np.where(okd, d, np.nan)
        fi = ffill_index(np.isfinite(dd))
        dfill = np.where(fi >= 0, dd[np.maximum(fi, 0)], np.nan)
        with np.errstate(invalid="ignore"):
            start = np.abs(dd - np.r_[np.nan, dfill[:-1]]) > lw.roll_change_jump
        cc, okc = ctx.s(f"core_change/{w.id}")
        if okc.any():
            c = np.where(okc, cc, 0.0)
            start |= (c >= 0.5) & (np.r_[0.0, c[:-1]] < 0.5)
        ln, okl = ctx.s(f"length/{w.id}")
        with np.errstate(invalid="ignore"):
            start |= (np.r_[np.nan, np.where(okl, ln, np.nan)[:-1]] - ln) > 1.0
        idx = ffill_index(start)
        ctx.roll_start[w.id] = start
        ctx.settling[w.id] = (idx >= 0) & (t - t[np.maximum(idx, 0)] < lw.roll_settle_time)
    return ctx


# --- the checks ---------------------------------------------------------------------------------

Result = tuple[np.ndarray, np.ndarray]  # value, valid


def physics_checks(line: Line, ctx: Context, extras: dict[tuple[str, ...], np.ndarray]
                   ) -> dict[tuple[str, str], Result]:
    """Traction, no-drive, slip, idler lag, drive fault, draw, tension zero, wound roll, length rate, runout."""
    m, s, mat = line.model, line.model.settings, line.model.material
    n = ctx.t.size
    out: dict[tuple[str, str], Result] = {}
    vw, okw = ctx.s("speed/web")
    prod, running = ctx.in_states(_PRODUCTION), ctx.state == _RUNNING
    # traction and no-drive: all driven rollers at once, (frames, rollers)
    rolls = [(r, m.zone_before(r.id), m.zone_after(r.id)) for r in m.driven_rollers]
    rolls = [(r, a, b) for r, a, b in rolls if a is not None and b is not None]
    if rolls:
        up, ok_up = ctx.m([f"tension/{a.id}" for _, a, _ in rolls])
        dn, ok_dn = ctx.m([f"tension/{b.id}" for _, _, b in rolls])
        vr, ok_vr = ctx.m([f"speed/{r.id}" if m.has_signal(f"speed/{r.id}") else "speed/web" for r, _, _ in rolls])
        mu = np.array([r.cof for r, _, _ in rolls])
        wrap = np.array([r.wrap for r, _, _ in rolls])
        sigma = combined_roughness(mat.roughness, np.array([r.roughness for r, _, _ in rolls]))
        film = np.array([r.air_film_factor * mat.air_film_factor for r, _, _ in rolls])
        lower = np.fmin(up, dn)
        mu_eff, _ = effective_cof(mu, np.array([r.diameter / 2 for r, _, _ in rolls]), lower, vw[:, None], vr, sigma,
                                  viscosity=s.air_viscosity, film_factor=film, model=s.air_film_model,
                                  convention=s.air_speed_convention, floor=s.air_traction_floor)
        u = traction_utilisation(up, dn, mu_eff, wrap)
        shown = demonstrated_cof(up, dn, wrap)
        with np.errstate(invalid="ignore"):
            no_drive = np.fmax(up, dn) < s.min_drive_tension
            gate = ~((ctx.state == _STOPPED) | (ctx.state == _THREADING))[:, None]
            valid = gate & ok_up & ok_dn & okw[:, None] & ok_vr & ~no_drive & (lower > 0) & ~(mu_eff * wrap <= 0)
            valid &= np.isfinite(u)
        nd_valid = prod[:, None] & ok_up & ok_dn & np.isfinite(up) & np.isfinite(dn)
        for i, (r, _, _) in enumerate(rolls):
            out[("traction", r.id)] = (u[:, i], valid[:, i])
            extras[("traction", r.id, "utilisation")] = np.where(valid[:, i], u[:, i], np.nan)
            extras[("traction", r.id, "mu_demonstrated")] = np.where(valid[:, i], shown[:, i], np.nan)
            out[("no_drive", r.id)] = (no_drive[:, i].astype(float), nd_valid[:, i])
            if r.has_fault_tag:
                f, okf = ctx.s(f"drive_fault/{r.id}")
                out[("drive_fault", r.id)] = ((f != 0).astype(float), okf & np.isfinite(f))
    # slip and idler lag: all rollers with an encoder at once
    enc = [r for r in m.rollers_in_path if r.has_encoder and r.id != s.web_speed_from]
    if enc:
        vr, ok_vr = ctx.m([f"speed/{r.id}" for r in enc])
        draw = np.array([r.draw if r.driven else 0.0 for r in enc])
        sr = slip_ratio(vr, vw[:, None], draw, s.thread_speed)
        valid = running[:, None] & ok_vr & okw[:, None] & (np.abs(vw) > s.thread_speed)[:, None] & np.isfinite(sr)
        for i, r in enumerate(enc):
            kind = "slip" if r.driven else "idler_lag"
            val = sr[:, i] if r.driven else -sr[:, i]
            out[(kind, r.id)] = (val, valid[:, i])
            extras[(kind, r.id, "value")] = np.where(valid[:, i], val, np.nan)
    # draw: zones between two driven rollers with load cells in and upstream of them, all at once (frames, zones)
    wdraw = s.frames(s.draw_window)
    zs = []
    for z in m.zones:
        if m.is_winder(z.upstream) or m.is_winder(z.downstream) or z.tension_tag is None:
            continue
        zb = m.zone_before(z.upstream)
        if zb is None or zb.tension_tag is None or not (m.has_signal(f"speed/{z.upstream}")
                                                        and m.has_signal(f"speed/{z.downstream}")):
            continue
        zs.append((z, zb))
    if zs:
        r1s, r2s = [m.rollers[z.upstream] for z, _ in zs], [m.rollers[z.downstream] for z, _ in zs]
        cmd = np.array([(1.0 + r2.draw) / (1.0 + r1.draw) if (r1.draw_configured or r2.draw_configured) else np.nan
                        for r1, r2 in zip(r1s, r2s, strict=True)])
        raw1, ok1 = ctx.m([f"tension/{zb.id}" for _, zb in zs])
        raw2, ok2 = ctx.m([f"tension/{z.id}" for z, _ in zs])
        rv1, okv1 = ctx.m([f"speed/{z.upstream}" for z, _ in zs])
        rv2, okv2 = ctx.m([f"speed/{z.downstream}" for z, _ in zs])
        (t1, f1), (t2, f2) = rolling_mean(raw1, ok1, wdraw), rolling_mean(raw2, ok2, wdraw)
        (v1, g1), (v2, g2) = rolling_mean(rv1, okv1, wdraw), rolling_mean(rv2, okv2, wdraw)
        _, steady = rolling_mean(running.astype(float), running, wdraw)
        with np.errstate(all="ignore"):
            x = rv2 / rv1 - 1.0
        okx = okv1 & okv2 & np.isfinite(x)
        x = np.where(okx, x, 0.0)
        mx = rolling_mean(x, okx, wdraw)[0]
        mxx = rolling_mean(x * x, okx, wdraw)[0]
        prev = np.vstack([np.zeros((1, x.shape[1])), x[:-1]])
        okp = np.vstack([np.zeros((1, x.shape[1]), bool), okx[:-1]])
        mxl = rolling_mean(x * prev, okx & okp, wdraw)[0]
        with np.errstate(all="ignore"):
            var = np.maximum(mxx - mx * mx, 0.0) * wdraw / max(wdraw - 1, 1)
            r1c = np.where(var > 0, (mxl - mx * mx) / var, 0.0)
            noise = mean_ratio_uncertainty(var, r1c, wdraw)
            measured = v2 / v1
            agree = np.isfinite(cmd) & (np.abs(measured - cmd) <= s.encoder_ratio_tolerance * cmd
                                        + np.nan_to_num(noise, nan=0.0))
        ratio, rnd = np.where(agree, cmd, measured), np.where(agree, 0.0, noise)
        et = mat.modulus * mat.caliper
        acc1 = np.array([zb.tension_accuracy for _, zb in zs])
        acc2 = np.array([z.tension_accuracy for z, _ in zs])
        pred = steady_span_tension(t1, 1.0, ratio, et)
        band = draw_band(t1, 1.0, ratio, et, modulus_tol=mat.modulus_tolerance, ratio_tol=s.encoder_ratio_tolerance,
                         t1_acc=acc1[:, 0] + acc1[:, 1] * np.abs(t1), t2_acc=acc2[:, 0] + acc2[:, 1] * np.abs(t2),
                         ratio_random=rnd)
        with np.errstate(all="ignore"):
            value = (t2 - pred) / band
            slow = (np.fmin(v1, v2) <= s.thread_speed) | ~(np.fmin(rv1, rv2) > s.thread_speed)
            valid = steady[:, None] & f1 & f2 & g1 & g2 & ~slow & (pred > 0) & np.isfinite(value)
            gain = t2 / pred
        for i, (z, _) in enumerate(zs):
            out[("draw", z.id)] = (value[:, i], valid[:, i])
            extras[("draw", z.id, "residual")] = np.where(valid[:, i], t2[:, i] - pred[:, i], np.nan)
            extras[("draw", z.id, "ratio")] = np.where(valid[:, i], gain[:, i], np.nan)
    # tension zero: every zone with a load cell and a setpoint
    stopped = ctx.state == _STOPPED
    for z in m.zones:
        if z.tension_tag is not None and z.setpoint is not None and z.setpoint > 0:
            x, okz = ctx.s(f"tension/{z.id}")
            share = x / z.setpoint
            with np.errstate(invalid="ignore"):
                out[("tension_zero", z.id)] = (share, stopped & okz & (np.abs(share) < 0.1))
    wcheck = s.frames(s.check_window)
    for w in m.winders_in_path:
        settling = ctx.settling.get(w.id, np.zeros(n, bool))
        d, okd = ctx.s(f"diameter/{w.id}")
        ln, okl = ctx.s(f"length/{w.id}")
        if m.has_signal(f"diameter/{w.id}") and m.has_signal(f"length/{w.id}"):
            _roll(line, w, ctx, d, okd, ln, okl, settling, out, extras)
        rot, okr = ctx.s(f"rotation/{w.id}")
        if w.has_diameter_sensor and w.has_rpm:
            (dm, rm, vm), oks = _means3((d, rot, vw), (okd, okr, okw), wcheck)
            with np.errstate(all="ignore"):
                rel = dm / diameter_from_speed(vm, rm) - 1.0
                valid = running & ~settling & oks & ~((np.abs(rm) < s.thread_speed / (np.pi * w.max_diameter))
                                                      | ~(dm > 0)) & np.isfinite(rel)
            out[("speed_diameter", w.id)] = (rel, valid)
        if m.has_signal(f"length/{w.id}"):
            vbar, okv = rolling_mean(vw, okw, wcheck)
            with np.errstate(all="ignore"):
                rate = (ln - lagged(ln, wcheck)) / (wcheck / s.frame_rate)
                rel = rate / vbar - 1.0
                okold = lagged(okl.astype(float), wcheck) == 1.0
                valid = running & ~settling & okl & okold & okv & (np.abs(vbar) > s.thread_speed) & ~(rate < 0)
                valid &= np.isfinite(rel)
            out[("length_rate", w.id)] = (rel, valid)
            extras[("length_rate", w.id, "value")] = np.where(valid, rel, np.nan)
    # runout: winders flagged for it (rotation from rpm) and driven rollers flagged for it
    moving = ctx.in_states(_PRODUCTION)
    for w in m.winders_in_path:
        if not w.runout_check or not (w.has_rpm or m.has_signal(f"diameter/{w.id}")):
            continue
        zone = m.zone_before(w.id) if w.rewind else m.zone_after(w.id)
        if zone is None or zone.tension_tag is None:
            continue
        if w.has_rpm:
            rot, okr = ctx.s(f"rotation/{w.id}")
            f1, okf = np.abs(rot), okr
        else:
            (d, okd), (v, okv) = ctx.s(f"diameter/{w.id}"), ctx.s("speed/web")
            f1, okf = rotation_frequency(v, d), okd & okv
        _runout(ctx, zone.id, f1, okf, moving, s.frame_rate, s.min_drive_tension, ("runout", w.id), out, extras)
    for r in m.driven_rollers:
        zone = m.zone_after(r.id)
        if r.runout_check and zone is not None and zone.tension_tag is not None:
            v, okv = ctx.s(f"speed/{r.id}")
            _runout(ctx, zone.id, np.abs(v) / (np.pi * r.diameter), okv, moving, s.frame_rate, s.min_drive_tension,
                    ("runout", r.id), out, extras)
    return out


def _means3(xs: tuple[np.ndarray, ...], oks: tuple[np.ndarray, ...], w: int
            ) -> tuple[tuple[np.ndarray, ...], np.ndarray]:
    mean, full = rolling_mean(np.stack(xs, axis=1), np.stack(oks, axis=1), w)
    return tuple(mean[:, i] for i in range(len(xs))), full.all(axis=1)


def _runout(ctx: Context, zone: str, f1: np.ndarray, okf: np.ndarray, moving: np.ndarray, fs: float, min_t: float,
            key: tuple[str, str], out: dict, extras: dict, revs: int = 4, max_frames: int = 4096) -> None:
    """Once-per-revolution amplitude over the last ``revs`` turns, whole recording at once (cumulative sums)."""
    ten, okt = ctx.s(f"tension/{zone}")
    f_min = revs * fs / (max_frames - 1)
    with np.errstate(invalid="ignore"):
        turning = okf & np.isfinite(f1) & (f1 >= f_min)
    phase = np.cumsum(np.where(turning, 2.0 * np.pi * f1 / fs, 0.0))
    ok = okt & turning & np.isfinite(ten)
    x = np.where(ok, ten, 0.0)
    start = np.searchsorted(phase, phase - revs * 2.0 * np.pi, side="right")
    end = np.arange(1, x.size + 1)
    count = end - start
    e = np.exp(-1j * (phase - phase[0]))
    cx = np.r_[0.0, np.cumsum(x)]
    ce = np.r_[0.0, np.cumsum(e)]
    cxe = np.r_[0.0, np.cumsum(x * e)]
    cbad = np.r_[0, np.cumsum(~ok)]
    with np.errstate(all="ignore"):
        mean = (cx[end] - cx[start]) / count
        amp = 2.0 * np.abs((cxe[end] - cxe[start]) - mean * (ce[end] - ce[start])) / count
        rel = amp / mean
        valid = (moving & ok & ~(f1 > fs / 4.0) & (mean >= min_t) & (start > 0) & (cbad[end] - cbad[start] == 0)
                 & (count <= max_frames - 1) & np.isfinite(rel))
    out[key] = (rel, valid)
    extras[(*key, "value")] = np.where(valid, rel, np.nan)


def _roll(line: Line, w: object, ctx: Context, d: np.ndarray, okd: np.ndarray, ln: np.ndarray, okl: np.ndarray,
          settling: np.ndarray, out: dict, extras: dict) -> None:
    """Roll diameter against the calibrated wound-length prediction, roll by roll; its caliper flag."""
    mat = line.model.material
    n = d.size
    sign = 1.0 if w.rewind else -1.0  # type: ignore[attr-defined]
    with np.errstate(invalid="ignore"):
        usable = okd & okl & np.isfinite(d) & np.isfinite(ln) & ~settling & (d > 0)
    value, valid = np.full(n, np.nan), np.zeros(n, bool)
    ratio, cal_dev = np.full(n, np.nan), np.full(n, np.nan)
    starts = np.flatnonzero(ctx.roll_start[w.id])  # type: ignore[attr-defined]
    bounds = [0, *[int(c) for c in starts if c > 0], n]
    history: list[float] = []
    for lo, hi in itertools.pairwise(bounds):
        idx = np.flatnonzero(usable[lo:hi]) + lo
        if idx.size < 3:
            continue
        x = ln[idx] - ln[idx[0]]
        y = d[idx] ** 2
        done = np.flatnonzero(np.abs(x) >= w.calibration_length)  # type: ignore[attr-defined]
        if not done.size:
            continue
        k = int(done[0])
        xs, ys = x[:k], y[:k]
        b, a = np.polyfit(xs, ys, 1) if k >= 3 else (sign * 4 * mat.caliper * mat.stack_factor / np.pi, ys.mean())
        t_cal = sign * b * np.pi / 4.0
        if not 0.5 * mat.caliper <= t_cal <= 3.0 * mat.caliper:
            continue
        j = idx[k:]
        xj = x[k:]
        arg = a + b * xj
        with np.errstate(invalid="ignore"):
            pred = np.sqrt(np.where(arg < (w.core_diameter ** 2 if sign < 0 else 0.0), np.nan, arg))  # type: ignore
        sd = w.diameter_accuracy[0] + w.diameter_accuracy[1] * d[j]  # type: ignore[attr-defined]
        sl = w.length_accuracy[0] + w.length_accuracy[1] * np.abs(xj)  # type: ignore[attr-defined]
        with np.errstate(all="ignore"):
            band = np.sqrt((2 * np.abs(xj) / (np.pi * pred) * mat.caliper_drift * t_cal) ** 2 + sd ** 2
                           + (2 * t_cal / (np.pi * pred) * sl) ** 2)
            value[j] = (d[j] - pred) / band
        valid[j] = np.isfinite(value[j])
        ax = np.abs(x)
        st = np.searchsorted(ax, ax - w.calibration_length, side="left")  # type: ignore[attr-defined]
        slope = local_slope(x, y, st)[k:]
        ratio[j] = np.where(ax[k:] - ax[st[k:]] >= 0.9 * w.calibration_length, slope / b, np.nan)  # type: ignore
        nominal = t_cal / (mat.caliper * mat.stack_factor) - 1.0
        hist = t_cal / float(np.median(history)) - 1.0 if history else np.nan
        cal_dev[j] = np.fmax(abs(nominal) / mat.stack_factor_tolerance, abs(hist) / (2 * mat.caliper_drift))
        history.append(t_cal)
    out[("roll_diameter", w.id)] = (value, valid)  # type: ignore[attr-defined]
    extras[("roll_diameter", w.id, "caliper_ratio")] = np.where(valid, ratio, np.nan)  # type: ignore
    out[("roll_caliper", w.id)] = (cal_dev, np.isfinite(cal_dev))  # type: ignore[attr-defined]


def tag_checks(line: Line, names: tuple[str, ...], fr: Frames, ctx: Context) -> dict[tuple[str, str], Result]:
    """Range, quality, stale and frozen over the (frames, tags) matrix at once."""
    m = line.model
    low = np.array([m.tags[nm].low for nm in names])
    high = np.array([m.tags[nm].high for nm in names])
    stale = np.array([m.tags[nm].stale_after for nm in names])
    v, q, age = fr.value, fr.quality, fr.age
    seen = q != 3
    with np.errstate(invalid="ignore"):
        fin = np.isfinite(v)
        rng = (~((v >= low) & (v <= high)) & fin).astype(float)
        qual = ((q != 0) | ~fin).astype(float)
        stl = (~(age <= stale)).astype(float)
    out: dict[tuple[str, str], Result] = {}
    frozen = [i for i, nm in enumerate(names) if m.tags[nm].frozen_after is not None]
    if frozen:
        vf = v[:, frozen]
        tol = np.array([m.tags[names[i]].frozen_tolerance for i in frozen])
        after = np.array([m.tags[names[i]].frozen_after for i in frozen])
        moving = ctx.in_states(_MOVING)
        prev = np.vstack([np.full((1, len(frozen)), np.nan), vf[:-1]])
        with np.errstate(invalid="ignore"):
            changed = (np.abs(vf - prev) > tol) | ~moving[:, None] | ~np.isfinite(prev) | ~np.isfinite(vf)
        idx = ffill_index(changed)
        still = fr.t[:, None] - fr.t[np.maximum(idx, 0)]
        fz = (still >= after).astype(float)
        for j, i in enumerate(frozen):
            out[("tag_frozen", names[i])] = (fz[:, j], moving & seen[:, i])
    for i, name in enumerate(names):
        out[("tag_range", name)] = (rng[:, i], seen[:, i])
        out[("tag_quality", name)] = (qual[:, i], seen[:, i])
        out[("tag_stale", name)] = (stl[:, i], ~(age[:, i] < 0))
    return out


def drift_checks(line: Line, ctx: Context, objects: list[str], extras: dict) -> dict[tuple[str, str], Result]:
    """A tabular CUSUM on 10 s batch means of each residual, all detectors stacked: (batches, detectors)."""
    d = line.model.drift
    out: dict[tuple[str, str], Result] = {}
    if not objects:
        return out
    rate = line.config.line.frame_rate
    per = max(1, round(d.period * rate))
    n = ctx.t.size
    nb = n // per
    running = ctx.state == _RUNNING
    residuals = [residual_of(obj) for obj in objects]
    bm = np.full((nb, len(objects)), np.nan)  # batch means (batches, detectors); a batch needs half its frames
    run_b = running[: nb * per].reshape(nb, per)
    for j, (obj, r) in enumerate(zip(objects, residuals, strict=True)):
        x = extras.get((r.source, obj[len(r.name) + 1:], r.field)) if r is not None else None
        if x is None:
            continue
        xb = x[: nb * per].reshape(nb, per)
        ok = run_b & np.isfinite(xb)
        cnt = ok.sum(axis=1)
        with np.errstate(invalid="ignore", divide="ignore"):
            bm[:, j] = np.where(cnt >= per / 2, np.where(ok, xb, 0.0).sum(axis=1) / cnt, np.nan)
    k, h = design_cusum(d.shift, arl0_for(d.false_alarm_interval, d.period, len(objects)))
    learn = max(20, round(d.learn / d.period))
    # operating points: runs of batches whose mean line speed stays within the speed band of the run's first
    v, okv = ctx.s("speed/web")
    vb = np.where(okv & running, v, np.nan)[: nb * per].reshape(nb, per)
    with np.errstate(invalid="ignore"), warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        speed = np.nanmean(vb, axis=1)
    runs: list[tuple[int, int, float]] = []  # (first batch, end batch, speed)
    for b in np.flatnonzero(np.isfinite(speed) & (speed > 0)):
        if not runs or abs(speed[b] / runs[-1][2] - 1.0) > d.speed_band:
            runs.append((int(b), int(b) + 1, float(speed[b])))
        else:
            runs[-1] = (runs[-1][0], int(b) + 1, runs[-1][2])
    runs = [(a, runs[i + 1][0] if i + 1 < len(runs) else nb, v0) for i, (a, _, v0) in enumerate(runs)]
    stat = np.full((nb, len(objects)), np.nan)
    for j, obj in enumerate(objects):
        col = bm[:, j]
        res = residuals[j]
        floor = res.sigma_floor if res is not None else 0.0
        segments = [(a, e, v0, False) for a, e, v0 in runs]  # (first batch, end batch, speed, re-learn there)
        if res is not None and res.roll_change:  # a roll change of its winder re-learns: cut the runs there too
            w = obj[len(res.name) + 1:] if "*" in res.roll_change else res.roll_change[0]
            starts = ctx.roll_start.get(w)
            if starts is not None and starts.any():
                segments = _cut(segments, np.unique(np.flatnonzero(starts[: nb * per]) // per + 1))
        known: list[tuple[float, object]] = []
        for a, e, v0, relearn in segments:
            if relearn:
                known = []
            good = np.flatnonzero(np.isfinite(col[a:e])) + a
            base = next((bl for vk, bl in known if abs(vk / v0 - 1.0) <= d.speed_band / 2), None)
            if base is None:
                if good.size <= learn:
                    continue
                base = learn_baseline(col[good[:learn]], sigma_floor=floor)
                known.append((v0, base))
                good = good[learn:]
            z = standardise(col[good], base)
            cu = np.cumsum(z - k)
            cl = np.cumsum(-z - k)  # Page's CUSUM with reset at 0: the sum less its running minimum
            hi = cu - np.minimum(np.minimum.accumulate(cu), 0.0)
            lo = cl - np.minimum(np.minimum.accumulate(cl), 0.0)
            stat[good, j] = np.maximum(hi, lo) / h
    frame_stat = np.full((n, len(objects)), np.nan, order="F")
    frame_stat[per: (nb + 1) * per] = np.repeat(stat, per, axis=0)[: n - per]
    for j, obj in enumerate(objects):
        out[("drift", obj)] = (frame_stat[:, j], running & np.isfinite(frame_stat[:, j]))
    return out


def _cut(segments: list[tuple[int, int, float, bool]], at: np.ndarray) -> list[tuple[int, int, float, bool]]:
    """The segments cut at the batches ``at``; a piece starting at a cut is marked to re-learn."""
    cutset = {int(b) for b in at}
    out = []
    for a, e, v0, relearn in segments:
        edges = [a, *sorted(b for b in cutset if a < b < e), e]
        out += [(lo, hi, v0, relearn or lo in cutset) for lo, hi in itertools.pairwise(edges)]
    return out


def alarm_pass(t: np.ndarray, results: dict[tuple[str, str], Result], points: list) -> tuple[int, dict[str, int]]:
    """Threshold and on-delay over every alarm point (no deadband, off-delay, chattering or first-out): a raise
    where a run of valid frames beyond the limit lasts the on-delay (the runs' starts and ends from one ``diff``)."""
    raised: dict[str, int] = {}
    for p in points:
        res = results.get((p.kind, p.object_id))
        if res is None:
            continue
        value, valid = res
        limit = p.limit if p.direction != "low" else -p.limit
        with np.errstate(invalid="ignore"):
            beyond = valid & (severity(value, p.direction) >= limit)
        if not beyond.any():
            continue
        edges = np.flatnonzero(np.diff(np.r_[np.int8(0), beyond.astype(np.int8), np.int8(0)]))
        begin, end = edges[0::2], edges[1::2] - 1
        c = int((t[end] - t[begin] >= p.on_delay - 1e-9).sum())
        if c:
            raised[p.kind] = raised.get(p.kind, 0) + c
    return sum(raised.values()), raised
