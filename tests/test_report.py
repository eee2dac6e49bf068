"""``spanwatch report`` end to end: a simulated night shift with faults, replayed into a real SQLite history, with
operator actions (a shelve with its reason, a removal from service, a comment) written the way the daemon writes
them; the report rendered by the real command line, loaded in headless Chromium (Debian's ``chromium``, driven over
the DevTools protocol by playwright) and printed to PDF.

The night shift chosen is the one of 28 March 2026 in Europe/Berlin, across the change to summer time: in the
European Union the change is at 01:00 UTC on the last Sunday of March (Directive 2000/84/EC, articles 2 and 3), the
29th in 2026, so the night shift 22:00-06:00 local runs from 21:00 UTC (UTC+1) to 04:00 UTC (UTC+2) and lasts
7 hours. The expected instants are computed with calendar.timegm from those UTC fields, never with the zone
database the code uses. The recording itself crosses the change (00:56 to 01:06 UTC).
"""

from __future__ import annotations

import calendar
import json
import os
import re
import sqlite3
import subprocess
import sys
from pathlib import Path

import pytest
from spanwatch.monitor.reporthtml import SECTIONS

REPO = Path(__file__).resolve().parents[1]
CONFIG = REPO / "config" / "quillmere-q2.toml"
CHROMIUM = "/usr/bin/chromium"
FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
         "--disable-component-update", "--disable-sync", "--no-first-run"]
LINE = "Q2 film rewinder"
DROPOUT_TAG = "q2.unwind.rpm"

SCENARIO = f"""
[scenario]
name = "report-test"
config = "{CONFIG.as_posix()}"
duration = "10 min"
start = "2026-03-29T01:56:00+01:00"
seed = 23

[[speed]]
at = "0 s"
to = "400 m/min"

[[fault]]
kind = "cof_drop"
target = "pull_1"
start = "60 s"
end = "150 s"
size = 0.10

[[fault]]
kind = "tag_dropout"
target = "{DROPOUT_TAG}"
start = "240 s"
end = "300 s"

[[fault]]
kind = "speed_ramp"
start = "400 s"
end = "460 s"
size = "700 m/min"

[[fault]]                       # still stale when the recording ends: its alarm is left open
kind = "tag_dropout"
target = "q2.rewind.rpm"
start = "540 s"
end = "600 s"
"""


def utc(*fields: int) -> float:
    return float(calendar.timegm((*fields, 0, 0, 0)[:6]))


def in_ci() -> bool:
    return os.environ.get("CI", "").lower() in ("1", "true", "yes")


def need(what: str, found: object) -> None:
    """Fail under CI=true, skip elsewhere, when something the test needs is missing."""
    if found:
        return
    if in_ci():
        pytest.fail(f"{what} is missing (CI=true: a test that needs it must not skip)")
    pytest.skip(f"{what} is missing (Debian: apt-get install chromium; pip install playwright)")


def cli(*args: str, ok: bool = True) -> subprocess.CompletedProcess:
    proc = subprocess.run([sys.executable, "-m", "spanwatch", *args], cwd=REPO, capture_output=True, text=True,
                          timeout=300, env={**os.environ, "COLUMNS": "200"})
    if ok:
        assert proc.returncode == 0, f"spanwatch {' '.join(args)} exited {proc.returncode}:\n{proc.stdout}\n" \
                                     f"{proc.stderr}"
    return proc


@pytest.fixture(scope="module")
def history(tmp_path_factory) -> tuple[Path, dict]:
    """A replayed history of the scenario with operator actions added; the simulator's ground truth."""
    from spanwatch.connectors.history import History, query_episodes
    from spanwatch.rules.lifecycle import Action, AlarmState, LifecycleEvent

    d = tmp_path_factory.mktemp("report")
    scenario = d / "scenario.toml"
    scenario.write_text(SCENARIO, encoding="utf-8")
    rec = d / "rec.parquet"
    cli("simulate", str(scenario), "--out", str(rec), "--no-progress")
    truth = json.loads((d / "rec.truth.json").read_text(encoding="utf-8"))
    db = d / "q2.db"
    cli("replay", str(rec), "--config", str(CONFIG), "--db", str(db), "--no-progress")

    url = f"sqlite:///{db}"
    eps = query_episodes(create_engine_for(url))
    stale = next(e for e in eps if e["check"] == "tag_stale" and e["object"] == DROPOUT_TAG)
    other = next(e for e in eps if e["check"] != "tag_stale")
    h = History(url)
    try:
        # what the daemon's lifecycle writes for an operator's request (monitor/operate.py carry_out)
        h.run_id, h.line_name = int(stale["run"]), LINE
        t = float(stale["raised_t"])
        key = f"tag_stale:{DROPOUT_TAG}:{stale['level']}"
        h.record([], lifecycle=[
            LifecycleEvent(t + 5.0, key, Action.SHELVE, AlarmState.UNACK, AlarmState.SHELVED, user="op-north",
                           comment="tacho cable being replaced", until=t + 1800.0),
            LifecycleEvent(t + 40.0, key, Action.UNSHELVE, AlarmState.SHELVED, AlarmState.NORMAL, user="op-south"),
            LifecycleEvent(float(other["raised_t"]) + 3.0, f"{other['check']}:{other['object']}:{other['level']}",
                           Action.COMMENT, AlarmState.UNACK, AlarmState.UNACK, user="op-north",
                           comment="roller surface looks glazed; maintenance told"),
            LifecycleEvent(t + 60.0, "slip:pull_2:alarm", Action.OUT_OF_SERVICE, AlarmState.NORMAL,
                           AlarmState.OUT_OF_SERVICE, user="tech-east", comment="encoder swap on pull_2"),
        ])
    finally:
        h.close()
    return db, {"truth": truth, "stale": stale, "other": other}


def create_engine_for(url: str):
    from spanwatch.connectors.history import make_engine

    return make_engine(url)


@pytest.fixture(scope="module")
def report(history, tmp_path_factory) -> tuple[Path, Path, str]:
    db, _ = history
    d = tmp_path_factory.mktemp("out")
    html, pdf = d / "night.html", d / "night.pdf"
    need(f"headless Chromium ({CHROMIUM})", os.path.exists(CHROMIUM))
    proc = cli("report", "--db", str(db), "--shift", "night", "--date", "2026-03-28", "--out", str(html),
               "--pdf", str(pdf))
    return html, pdf, proc.stdout


@pytest.fixture(scope="module")
def browser():
    need(f"headless Chromium ({CHROMIUM})", os.path.exists(CHROMIUM))
    try:
        from playwright.sync_api import sync_playwright
    except ImportError:
        need("the Python package playwright (test extras)", False)
    with sync_playwright() as p:
        b = p.chromium.launch(executable_path=CHROMIUM, args=FLAGS)
        try:
            yield b
        finally:
            b.close()


def load(browser, html: Path) -> dict:
    """Open ``html`` in Chromium: console errors, page errors, requests, headings and every image's state."""
    page = browser.new_page(viewport={"width": 1100, "height": 1400})
    errors: list[str] = []
    requests: list[str] = []
    page.on("console", lambda m: errors.append(m.text) if m.type == "error" else None)
    page.on("pageerror", lambda e: errors.append(str(e)))
    page.on("request", lambda r: requests.append(r.url))
    page.goto(html.as_uri(), wait_until="load")
    out = {
        "errors": errors, "requests": requests,
        "h2": page.eval_on_selector_all("h2", "els => els.map(e => e.textContent.trim())"),
        "images": page.eval_on_selector_all("img", "els => els.map(e => [e.complete, e.naturalWidth, "
                                                   "e.naturalHeight, e.getAttribute('alt')])"),
        "text": page.inner_text("body"),
        "sections": {s: page.inner_text(f"section#{sid}") for s, sid in
                     ((s, "".join(ch if ch.isalnum() else "-" for ch in s.lower()).strip("-")) for s in SECTIONS)},
    }
    page.close()
    return out


# --- the window ----------------------------------------------------------------------------------------------------


def test_the_night_shift_across_the_change_to_summer_time_is_the_window(report, history):
    _, _, out = report
    # 22:00 CET (UTC+1) on the 28th is 21:00 UTC; 06:00 CEST (UTC+2) on the 29th is 04:00 UTC (Directive 2000/84/EC)
    from spanwatch.monitor.cli_report import _window
    from spanwatch.monitor.shifts import PlantClock

    clock = PlantClock("Europe/Berlin", {"early": "06:00-14:00", "late": "14:00-22:00", "night": "22:00-06:00"})
    start, end, label = _window(clock, "night", "2026-03-28", None, None, where="the --config")
    assert (start, end) == (utc(2026, 3, 28, 21, 0), utc(2026, 3, 29, 4, 0))
    assert label == "night 2026-03-28"
    assert "night 2026-03-28: 2026-03-28 22:00 to 2026-03-29 06:00 (Europe/Berlin, 7 h 00 min)" in \
        " ".join(out.split())
    # the replayed data (00:56 to 01:06 UTC, across the change) falls inside: the run is covered
    assert re.search(r"runs: \d+ \(replay\)", out), out


def test_the_terminal_summary_fits_80_columns(report):
    _, _, out = report
    lines = out.splitlines()
    assert len(lines) > 15
    assert max(len(x) for x in lines) <= 80, max(lines, key=len)
    assert "not a safety function" in out and "lock-out" in " ".join(out.split())


def test_the_summary_names_the_shelved_alarm_with_who_and_why(report, history):
    _, _, out = report
    flat = " ".join(out.split())
    assert f"tag_stale:{DROPOUT_TAG}:" in flat and "shelved" in flat
    assert "by op-north: tacho cable being replaced" in flat
    assert "slip:pull_2:alarm out of service" in flat and "tech-east: encoder swap on pull_2" in flat


# --- the page in Chromium ----------------------------------------------------------------------------------------


def test_the_page_loads_in_chromium_without_errors_with_every_section_and_image(report, browser, history):
    html, _, _ = report
    page = load(browser, html)
    assert page["errors"] == []
    assert page["h2"] == list(SECTIONS)
    # self-contained: nothing but the page itself and its data: images is fetched
    assert all(u == html.as_uri() or u.startswith("data:") for u in page["requests"]), page["requests"]
    imgs = page["images"]
    assert len(imgs) >= 4 + 2  # timeline, rate, time in alarm, and at least two episodes' signals
    for complete, w, h, alt in imgs:
        assert complete and w > 0 and h > 0, alt


def test_the_page_holds_the_faults_the_operators_and_the_safety_note(report, browser, history):
    html, _, _ = report
    _, info = history
    page = load(browser, html)
    s = page["sections"]
    assert "does not replace guarding, safety-rated controls or lock-out" in s["Safety note"]
    assert "local codes and qualified practice" in s["Safety note"]
    # the tag the simulator stopped (ground truth) is in the episodes, raised within its dropout
    drop = next(f for f in info["truth"]["faults"] if f["kind"] == "tag_dropout")
    assert drop["start_epoch"] <= info["stale"]["raised_t"] <= drop["end_epoch"] + 30.0
    assert f"tag_stale on {DROPOUT_TAG}" in s["Alarm episodes"]
    shelf = s["Shelved and out of service"]
    assert "op-north" in shelf and "tacho cable being replaced" in shelf and "unshelve by op-south" in shelf
    assert "tech-east" in shelf and "encoder swap on pull_2" in shelf
    assert "roller surface looks glazed; maintenance told" in s["Alarm episodes"]
    try:
        import spanwatch.connectors.history.trends  # noqa: F401
    except ImportError:  # this version stores no per-minute check values: the page says so
        assert "no check values stored for this window" in s["Check trends"]


def test_the_pdf_is_printed_from_the_same_page(report):
    _, pdf, out = report
    data = pdf.read_bytes()
    assert data.startswith(b"%PDF"), data[:16]
    assert f"wrote {pdf}" in out


# --- errors --------------------------------------------------------------------------------------------------------


def test_a_shift_without_a_calendar_is_a_clear_error(history, tmp_path):
    db, _ = history
    text = CONFIG.read_text(encoding="utf-8")
    no_shifts = re.sub(r"\n\[shifts\]\n(?:[a-z]+ = \"[^\"]*\"\n)+", "\n", text)
    assert "[shifts]" not in no_shifts
    cfg = tmp_path / "no-shifts.toml"
    cfg.write_text(no_shifts, encoding="utf-8")
    proc = cli("report", "--db", str(db), "--config", str(cfg), "--shift", "night", "--date", "2026-03-28",
               "--out", str(tmp_path / "x.html"), ok=False)
    assert proc.returncode == 2
    assert "no shift calendar" in proc.stderr and "[shifts]" in proc.stderr
    assert "Traceback" not in proc.stderr


def test_bad_windows_and_options_exit_2_with_what_was_expected(history, tmp_path):
    db, _ = history
    out = str(tmp_path / "x.html")
    for args, says in ((["--from", "yesterday", "--to", "2026-03-29 06:00"], "--from: expected a time"),
                       (["--from", "2026-03-29 06:00", "--to", "2026-03-28 22:00"], "before --to"),
                       (["--shift", "dawn"], "expected a shift of the calendar"),
                       (["--shift", "night", "--date", "28.3.2026"], "YYYY-MM-DD"),
                       ([], "--shift NAME"),
                       (["--shift", "night", "--line", "Q9"], "no run of line 'Q9'")):
        proc = cli("report", "--db", str(db), "--out", out, *args, ok=False)
        assert proc.returncode == 2, (args, proc.stdout, proc.stderr)
        assert says in proc.stderr, (args, proc.stderr)
        assert "Traceback" not in proc.stderr


def test_pdf_without_chromium_says_so(tmp_path, monkeypatch):
    from spanwatch.monitor.cli_report import print_pdf

    page = tmp_path / "p.html"
    page.write_text("<!DOCTYPE html><p>x</p>", encoding="utf-8")
    monkeypatch.setenv("PATH", str(tmp_path))
    with pytest.raises(RuntimeError, match=r"Chromium is needed.*missing"):
        print_pdf(page, tmp_path / "p.pdf", chromium=str(tmp_path / "no-chromium"))
    assert not (tmp_path / "p.pdf").exists()


# --- pure parts ----------------------------------------------------------------------------------------------------


def test_time_in_alarm_is_the_union_per_check_clipped_to_the_window():
    # worked by hand (common practice, no source: time in alarm = time with at least one alarm of the check active)
    from spanwatch.monitor.shiftreport import time_in_alarm

    eps = [{"check": "traction", "raised_t": -50.0, "cleared_t": 100.0},   # clipped at the start: 0..100
           {"check": "traction", "raised_t": 80.0, "cleared_t": 200.0},    # overlaps: union 0..200
           {"check": "traction", "raised_t": 500.0, "cleared_t": None},    # active to the end: 500..1000
           {"check": "slip", "raised_t": 900.0, "cleared_t": 2000.0}]      # clipped at the end: 900..1000
    rows = {r["check"]: r for r in time_in_alarm(eps, 0.0, 1000.0)}
    assert rows["traction"]["seconds"] == 700.0 and rows["traction"]["episodes"] == 3
    assert rows["slip"]["seconds"] == 100.0 and rows["slip"]["share"] == 0.1


def test_shelved_periods_end_at_unshelve_expiry_or_clear():
    # ISA-18.2 shelving: timed (ends at its time or an unshelve) or one-shot (ends when the alarm clears; OPC UA
    # Part 9 OneShotShelve); out of service until returned to service (ANSI/ISA-18.2-2016 state model, from memory)
    from spanwatch.monitor.shiftreport import hidden_periods

    def act(t, key, action, user="", comment="", until=None, one_shot=False):
        return {"t": t, "key": key, "action": action, "user": user, "comment": comment, "until": until,
                "one_shot": one_shot, "episode": None}

    actions = [act(10, "a", "shelve", "ann", "known", until=500.0),
               act(20, "b", "shelve", "bob", "cable", until=5000.0), act(300, "b", "unshelve", "cat"),
               act(30, "c", "shelve", "dan", "one shot", until=float("inf"), one_shot=True),
               act(40, "d", "out_of_service", "eve", "swap"), act(60, "d", "return_to_service", "eve"),
               act(50, "e", "out_of_service", "fay", "still out")]
    got = {p["key"]: p for p in hidden_periods(actions, 0.0, 1000.0, cleared=lambda k, t: 700.0 if k == "c" else None)}
    assert (got["a"]["to"], got["a"]["ended_by"]) == (500.0, "expired")
    assert (got["b"]["to"], got["b"]["ended_by"]) == (300.0, "unshelve by cat")
    assert (got["c"]["to"], got["c"]["ended_by"]) == (700.0, "alarm cleared")
    assert (got["d"]["to"], got["d"]["ended_by"]) == (60.0, "return to service by eve")
    assert got["e"]["to"] is None and got["e"]["what"] == "out of service" and got["e"]["comment"] == "still out"
    # a shelve that ended before the window is not shown
    assert hidden_periods(actions, 800.0, 1000.0, cleared=lambda k, t: 700.0) == [
        p for p in hidden_periods(actions, 800.0, 1000.0, cleared=lambda k, t: 700.0) if p["key"] == "e"]


# --- check trends from per-minute rows -----------------------------------------------------------------------------


def minute_rows(start: float) -> list[dict]:
    """Per-minute rows as query_check_minutes gives them (built here): two objects of traction over 30 min, one
    with a gap of 5 min."""
    rows = []
    for obj, base in (("pull_1", 0.40), ("pull_2", 0.55)):
        for i in range(30):
            if obj == "pull_2" and 10 <= i < 15:
                continue
            v = base + 0.01 * (i % 7)
            rows.append({"run": 1, "line": LINE, "check": "traction", "object": obj, "t": start + 60.0 * i,
                         "n": 3000, "valid": 2990, "min": v - 0.02, "mean": v, "max": v + 0.02, "unit": "% of limit"})
    return rows


def test_trend_plot_draws_per_minute_rows_with_their_limits():
    from spanwatch.monitor.reportplots import trend_plot
    from spanwatch.monitor.shifts import PlantClock

    start = utc(2026, 3, 2, 5, 0)
    png = trend_plot("traction", minute_rows(start), {"pull_1": [{"level": "warning", "limit": 0.8},
                                                                  {"level": "alarm", "limit": 0.95}]},
                     start, start + 1800.0, PlantClock("Europe/Berlin"))
    # a PNG (ISO/IEC 15948 signature) of the figure's size
    assert png[:8] == b"\x89PNG\r\n\x1a\n"
    w, h = int.from_bytes(png[16:20], "big"), int.from_bytes(png[20:24], "big")
    assert 600 < w < 1400 and 200 < h < 600


def test_trends_appear_in_the_page_when_rows_are_stored(history, browser, tmp_path):
    import types

    from spanwatch.connectors.history import open_reader
    from spanwatch.monitor import shiftreport
    from spanwatch.monitor.reporthtml import render
    from spanwatch.monitor.shifts import PlantClock

    db, _ = history
    start, end = utc(2026, 3, 29, 0, 50), utc(2026, 3, 29, 1, 20)
    engine = open_reader(f"sqlite:///{db}")
    fake = types.ModuleType("spanwatch.connectors.history.trends")
    fake.query_check_minutes = lambda engine, *, start, end, line=None, run_id=None, check=None, obj=None: \
        minute_rows(utc(2026, 3, 29, 0, 56))
    sys.modules[fake.__name__] = fake
    try:
        r = shiftreport.gather(engine, line=LINE, plant="Quillmere Works (fictional)", start=start, end=end,
                               label="test", clock=PlantClock("Europe/Berlin"),
                               points=[{"kind": "traction", "object_id": "pull_1", "level": "alarm", "limit": 0.95,
                                        "direction": "high", "unit": "% of limit"}], config_source="test")
    finally:
        del sys.modules[fake.__name__]
        engine.dispose()
    assert len(r.trends) == 55
    html = tmp_path / "trends.html"
    html.write_text(render(r), encoding="utf-8")
    page = load(browser, html)
    assert page["errors"] == []
    assert "no check values stored" not in page["sections"]["Check trends"]
    assert any(alt == "trend of traction" and w > 0 for _, w, _, alt in page["images"])


def test_no_stored_values_say_so():
    from types import SimpleNamespace

    from spanwatch.monitor.reporthtml import _trends
    from spanwatch.monitor.shiftreport import NO_TRENDS

    assert NO_TRENDS in _trends(SimpleNamespace(trends=[], limits={}))


def test_db_rows_match_the_summary_counts(report, history):
    """The summary's episode count is what the history holds for the window (read with sqlite3, not spanwatch)."""
    db, _ = history
    _, _, out = report
    a, b = utc(2026, 3, 28, 21, 0), utc(2026, 3, 29, 4, 0)
    with sqlite3.connect(db) as con:
        n = con.execute("select count(*) from alarm_episodes where raised_t < ? and (cleared_t is null or "
                        "cleared_t > ?)", (b, a)).fetchone()[0]
    m = re.search(r"(\d+) episodes active in the window", " ".join(out.split()))
    assert m and int(m.group(1)) == n > 0


def test_a_window_after_the_data_claims_no_alarm_active(history, tmp_path):
    """The replay ended at 01:06 UTC (03:06 summer time); an alarm its run left open is known active only up to
    there, so a window after it holds no run, no active episode and no time in alarm."""
    db, _ = history
    with sqlite3.connect(db) as con:
        assert con.execute("select count(*) from alarm_episodes where cleared_t is null").fetchone()[0] > 0
    proc = cli("report", "--db", str(db), "--from", "2026-03-29 04:00", "--to", "2026-03-29 05:00", "--out",
               str(tmp_path / "after.html"))
    flat = " ".join(proc.stdout.split())
    assert "runs: none" in flat and "0 episodes active in the window" in flat
    assert "Time in alarm per check" not in flat


def test_a_plant_report_covers_every_line_and_keeps_them_apart(history, tmp_path):
    """One history, two lines (the same recording replayed as line Q2 and as a line Q3 of its own name):
    ``--line all`` counts the episodes of both (read with sqlite3) and ranks each line's alarms under its name."""
    import shutil

    db, _ = history
    plant = tmp_path / "plant.db"
    shutil.copy(db, plant)
    q3 = tmp_path / "q3.toml"
    q3.write_text(f'extends = "{CONFIG}"\n\n[line]\nname = "Q3 film rewinder"\n', encoding="utf-8")
    cli("replay", str(db.parent / "rec.parquet"), "--config", str(q3), "--db", str(plant), "--no-progress")
    proc = cli("report", "--db", str(plant), "--line", "all", "--shift", "night", "--date", "2026-03-28",
               "--out", str(tmp_path / "plant.html"))
    flat = " ".join(proc.stdout.split())
    assert "all lines (Q2 film rewinder, Q3 film rewinder)" in flat
    a, b = utc(2026, 3, 28, 21, 0), utc(2026, 3, 29, 4, 0)
    with sqlite3.connect(plant) as con:
        per_line = dict(con.execute(
            "select r.line_name, count(*) from alarm_episodes e join runs r on r.id = e.run_id where e.raised_t < ? "
            "and (e.cleared_t is null or e.cleared_t > ?) group by r.line_name", (b, a)).fetchall())
    assert set(per_line) == {"Q2 film rewinder", "Q3 film rewinder"} and min(per_line.values()) > 0
    m = re.search(r"(\d+) episodes active in the window", flat)
    assert m and int(m.group(1)) == sum(per_line.values())
    page = (tmp_path / "plant.html").read_text(encoding="utf-8")
    assert "Q2 film rewinder/" in page and "Q3 film rewinder/" in page, "alarms named with their line"
    one = cli("report", "--db", str(plant), "--line", "Q3 film rewinder", "--shift", "night", "--date",
              "2026-03-28", "--out", str(tmp_path / "q3.html"))
    m3 = re.search(r"(\d+) episodes active in the window", " ".join(one.stdout.split()))
    assert m3 and int(m3.group(1)) == per_line["Q3 film rewinder"]
