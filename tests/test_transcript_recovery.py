"""Recovery logs: what the app appends survives a crash, and `logitfork recover` reads it.

The crash is real: a subprocess runs a session on the tiny model, writing a recovery
log, and is killed with SIGKILL (POSIX kill(2): no handler, no flush, no atexit). The
other checks replay random sequences of session changes (steps, rewinds, forks, recipe
changes, removals, restarts) into a log and compare what is read back with the
session's own final state, worked out independently by `FakeSession` below.
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
from dataclasses import replace
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from transcript_fakes import record, run_cli

from tui.session.opening import SessionInfo
from tui.session.record import STOP_EOS
from tui.session.scenario import PaneSpec, Scenario
from tui.session.views import PaneView, SessionView
from tui.transcripts.headers import PaneHeader
from tui.transcripts.reader import StoredSession, TranscriptError
from tui.transcripts.recovery_log import RecoveryLog, recovery_dir
from tui.settings import STATE_DIR_ENV
from tui.transcripts.recovery_reader import list_recoveries, read_recovery

REPO = Path(__file__).resolve().parents[1]
INFO = SessionInfo(Scenario("Recovered tale", (PaneSpec("a", "greedy"),), prompt="Once"),
                   "hand-made", "nowhere", "float32")


class FakeSession:
    """The engine's bookkeeping without a model: records per pane, rewinds, forks."""

    def __init__(self) -> None:
        self.seed, self.next_id, self.tick = 5, 0, 0
        self.draws = [(0, True)]  # (from step, shared draws), as the engine's draw log
        self.panes: list[dict] = []
        for _ in range(2):
            self.add(None, [])

    def add(self, origin, records) -> int:
        pid = self.next_id
        self.next_id += 1
        recipe = f"top_k={pid + 1}"
        self.panes.append({"id": pid, "name": f"p{pid}", "recipe": recipe, "origin": origin,
                           "log": [(len(records), recipe)],
                           "records": [replace(r, pane=pid) for r in records]})
        return pid

    def view(self) -> SessionView:
        panes = tuple(PaneView(p["id"], p["name"], p["recipe"], None, tuple(p["records"]),
                               p["records"][-1].stop if p["records"] else None,
                               tuple(p["log"]), p["origin"]) for p in self.panes)
        return SessionView(max((len(p["records"]) for p in self.panes), default=0), self.seed,
                           self.draws[-1][1], panes, tuple(self.draws))

    def step(self, stop_pane: int | None) -> list:
        out = []
        for p in self.panes:
            if p["records"] and p["records"][-1].stop:
                continue
            self.tick += 1
            t = len(p["records"])
            rec = record(t, p["id"], self.tick % 300, f"w{self.tick}", 0.5,
                         stop=STOP_EOS if p["id"] == stop_pane else None)
            p["records"].append(rec)
            out.append(rec)
        return out

    def rewind(self, t: int) -> None:
        for p in self.panes:
            del p["records"][t:]
            p["log"] = sorted({min(s, t): r for s, r in p["log"]}.items())
        self.draws = sorted({min(s, t): b for s, b in self.draws}.items())

    def toggle_draws(self) -> None:
        step = self.view().step
        self.draws = [e for e in self.draws if e[0] < step] + [(step, not self.draws[-1][1])]

    def fork(self, index: int) -> int | None:
        src = self.panes[index % len(self.panes)]
        if len(self.panes) >= 8 or (src["records"] and src["records"][-1].stop):
            return None
        pid = self.add((src["id"], len(src["records"])), src["records"])
        return pid

    def set_recipe(self, index: int, recipe: str) -> dict:
        p = self.panes[index % len(self.panes)]
        step = len(p["records"])
        p["recipe"] = recipe
        p["log"] = [e for e in p["log"] if e[0] < step] + [(step, recipe)]
        return p


OPS = st.lists(st.one_of(
    st.tuples(st.just("step"), st.integers(0, 12)),
    st.tuples(st.just("rewind"), st.integers(0, 6)),
    st.tuples(st.just("fork"), st.integers(0, 7)),
    st.tuples(st.just("recipe"), st.integers(0, 7)),
    st.tuples(st.just("remove"), st.integers(0, 7)),
    st.tuples(st.just("restart"), st.integers(0, 99)),
    st.tuples(st.just("draws"), st.just(0)),
), max_size=40)


def _drive(log: RecoveryLog, ops, api: str) -> FakeSession:
    s = FakeSession()
    log.begin(s.view(), INFO, [1, 2, 3])
    for op, arg in ops:
        if op == "step":
            recs = s.step(stop_pane=arg if arg < 8 else None)
            if api == "calls":
                log.append(recs)
        elif op == "rewind":
            t = min(arg, s.view().step)
            s.rewind(t)
            if api == "calls":
                log.event("rewind", step=t)
                log.event("session", seed=s.seed, shared_draws=s.draws[-1][1], draw_log=s.draws)
        elif op == "fork":
            pid = s.fork(arg)
            if pid is not None and api == "calls":
                log.event("pane", pane=next(p for p in s.view().panes if p.id == pid))
        elif op == "recipe":
            pane = s.set_recipe(arg, f"temperature=0.{arg + 1}")
            if api == "calls":
                log.event("pane", pane=next(p for p in s.view().panes if p.id == pane["id"]))
        elif op == "remove" and len(s.panes) > 1:
            gone = s.panes.pop(arg % len(s.panes))
            if api == "calls":
                log.event("remove_pane", pane=gone["id"])
        elif op == "restart":
            s.rewind(0)
            s.seed, s.draws = arg, [(0, s.draws[-1][1])]
            if api == "calls":
                log.event("rewind", step=0)
                log.event("session", seed=arg, shared_draws=s.draws[-1][1], draw_log=s.draws)
        elif op == "draws":
            s.toggle_draws()
            if api == "calls":
                log.event("session", seed=s.seed, shared_draws=s.draws[-1][1], draw_log=s.draws)
        if api == "sync":
            log.sync(s.view())
    return s


def _assert_same(recovered, view: SessionView) -> None:
    assert [p.id for p in recovered.header.panes] == [p.id for p in view.panes]
    assert recovered.header.panes == tuple(PaneHeader.of(p) for p in view.panes)
    for p in view.panes:
        assert recovered.records[p.id] == p.records
    assert recovered.header.seed == view.seed
    assert recovered.header.shared_draws == view.shared_draws
    assert recovered.header.draw_log == (view.draw_log if len(view.draw_log) > 1 else ())


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(ops=OPS, api=st.sampled_from(["sync", "calls"]), flush_every=st.integers(1, 5))
def test_any_sequence_of_changes_reads_back_as_the_final_session(tmp_path, ops, api, flush_every):
    path = tmp_path / f"log-{api}.jsonl"
    log = RecoveryLog(path, flush_every=flush_every)
    s = _drive(log, ops, api)
    log.close()
    recovered = read_recovery(path)
    _assert_same(recovered, s.view())
    out = tmp_path / "out.jsonl"  # and as a normal transcript, through the strict reader
    from tui.files import write_atomic

    write_atomic(out, recovered.transcript_lines())
    stored = StoredSession.open(out)
    assert stored.header.panes == recovered.header.panes
    assert all(tuple(stored.pane_records(p.id)) == recovered.records[p.id]
               for p in stored.panes)


def test_steps_reach_the_disk_every_flush_every_steps_and_on_close(tmp_path):
    s = FakeSession()
    log = RecoveryLog(tmp_path / "l.jsonl", flush_every=4)
    log.begin(s.view(), INFO, [1])
    for _ in range(3):
        log.append(s.step(None))
    assert read_recovery(log.path).steps == 0  # nothing held back is on disk yet
    log.append(s.step(None))
    assert read_recovery(log.path).steps == 4
    log.append(s.step(None))
    log.event("pane", pane=s.view().panes[0])  # an event is flushed at once, with the step
    assert read_recovery(log.path).steps == 5
    log.append(s.step(None))
    log.close()
    assert read_recovery(log.path).steps == 6
    log.append(s.step(None))  # a late call after close is ignored, not an error


def test_the_default_place_is_the_state_folder_and_a_clean_quit_deletes(tmp_path, monkeypatch):
    monkeypatch.setenv(STATE_DIR_ENV, str(tmp_path / "state"))
    log = RecoveryLog(None)
    assert log.path.parent == tmp_path / "state" / "recovery" == recovery_dir()
    log.begin(FakeSession().view(), INFO, [1])
    assert log.path.is_file()
    log.close(delete=True)
    assert not log.path.exists()


def test_a_disk_error_stops_the_log_without_raising(tmp_path):
    blocker = tmp_path / "file"
    blocker.write_text("x")
    log = RecoveryLog(blocker / "cannot" / "be.jsonl")  # a folder under a plain file
    s = FakeSession()
    log.begin(s.view(), INFO, [1])
    log.append(s.step(None))
    assert log.error and "recovery log stopped" in log.error
    log.close()


def test_a_log_with_a_cut_last_line_recovers_the_lines_before(tmp_path, capsys):
    s = FakeSession()
    log = RecoveryLog(tmp_path / "l.jsonl", flush_every=1)
    log.begin(s.view(), INFO, [1])
    for _ in range(5):
        log.append(s.step(None))
    log.close()
    data = log.path.read_bytes()
    log.path.write_bytes(data[:-25])
    rec = read_recovery(log.path)
    assert "cut short" in capsys.readouterr().err
    assert [len(r) for r in rec.records.values()] == [5, 4]


def test_a_step_for_a_pane_the_log_never_added_is_an_error(tmp_path):
    s = FakeSession()
    log = RecoveryLog(tmp_path / "l.jsonl")
    log.begin(s.view(), INFO, [1])
    log.close()
    with log.path.open("a") as fh:
        fh.write(json.dumps({"kind": "step", **record(0, 9, 1, "x", 0.5).to_json()}) + "\n")
    with pytest.raises(TranscriptError, match=r":2: pane: 9 is not a pane"):
        read_recovery(log.path)


def test_a_transcript_is_refused_by_recover_and_a_log_by_report(tmp_path, monkeypatch, capsys):
    from transcript_fakes import write_sample

    sample = write_sample(tmp_path / "t.jsonl")
    assert run_cli(["recover", str(sample), "--out", str(tmp_path / "o.jsonl")], monkeypatch) == 2
    assert "this is a transcript, not a recovery log" in capsys.readouterr().err
    log = RecoveryLog(tmp_path / "l.jsonl")
    log.begin(FakeSession().view(), INFO, [1])
    log.close()
    assert run_cli(["report", str(log.path)], monkeypatch) == 2
    assert "recovery log, not a transcript" in capsys.readouterr().err


# ----- a real crash ---------------------------------------------------------------------------

CHILD = r"""
import json, sys
from tui.model.catalogue import load_model
from tui.transcripts.recovery_log import RecoveryLog
from tui.session.scenario import parse_scenario
from tui.session.opening import open_session

lm = load_model(sys.argv[1])
sc = parse_scenario({"title": "Killed mid-run", "prompt": "The ferry bell rang", "seed": 4,
                     "max_new_tokens": 200,
                     "pane": [{"name": "warm", "recipe": "temperature=1.0"},
                              {"name": "narrow", "recipe": "top_k=3"}]})
engine, info = open_session(lm, sc)
log = RecoveryLog(None, flush_every=4)
log.begin(engine.view(), info, engine.prompt_ids)

def tell(kind):
    v = engine.view()
    print(json.dumps({"kind": kind, "tokens": {p.id: [r.token_id for r in p.records]
                                               for p in v.panes}}), flush=True)

for t in range(8):
    log.append(engine.step())
engine.rewind(5)
log.event("rewind", step=5)
fork = engine.fork(0, "top_p=0.5", "fork")
log.event("pane", pane=[p for p in engine.view().panes if p.id == fork][0])
engine.set_recipe(1, "temperature=0.7")
log.event("pane", pane=engine.view().panes[1])
for t in range(26):  # 26 appends after the last event: 2 of them not yet flushed
    log.append(engine.step())
    tell("step")
print("ready", flush=True)
sys.stdin.readline()  # wait here, log open, until killed
"""


def test_a_session_killed_mid_run_is_recovered(tmp_path, tiny_model_dir, monkeypatch, capsys):
    state = tmp_path / "state"
    env = {**os.environ, STATE_DIR_ENV: str(state), "PYTHONPATH": str(REPO),
           "HF_HUB_OFFLINE": "1", "TOKENIZERS_PARALLELISM": "false"}
    child = subprocess.Popen([sys.executable, "-c", CHILD, str(tiny_model_dir)], env=env,
                             stdin=subprocess.PIPE, stdout=subprocess.PIPE,
                             stderr=subprocess.DEVNULL, text=True)
    last = None
    try:
        for line in child.stdout:
            if line.strip() == "ready":
                break
            last = json.loads(line)
        else:
            pytest.fail("the child ended before it was ready")
        child.send_signal(signal.SIGKILL)
    finally:
        child.kill()
        child.wait()
    assert child.returncode == -signal.SIGKILL
    assert last is not None
    shown = {int(k): v for k, v in last["tokens"].items()}  # what the session held

    logs = list((state / "recovery").glob("*.jsonl"))
    assert len(logs) == 1
    rec = read_recovery(logs[0])
    held = {pid: [r.token_id for r in recs] for pid, recs in rec.records.items()}
    assert set(held) == set(shown) == {0, 1, 2}
    for pid in shown:  # all but the last few steps, and exactly the session's tokens
        assert len(shown[pid]) - 4 < len(held[pid]) <= len(shown[pid])
        assert held[pid] == shown[pid][: len(held[pid])]
    # The session held 31 steps; the last 2 appends were not flushed yet (4 per flush).
    assert [len(h) for h in held.values()] == [min(len(shown[p]), 29) for p in held]
    assert rec.header.pane(2).origin == (0, 5)
    assert rec.header.pane(1).recipe_log == ((0, "top_k=3"), (5, "temperature=0.7"))

    monkeypatch.setenv(STATE_DIR_ENV, str(state))
    assert run_cli(["recover"], monkeypatch) == 0
    listing = capsys.readouterr().out
    assert "Killed mid-run" in listing and str(tiny_model_dir) in listing
    row = next(line for line in listing.splitlines() if "Killed mid-run" in line)
    steps = max(len(h) for h in held.values())
    assert row.split()[2:4] == [str(steps), "3"]  # steps, panes
    assert "still running" not in row
    [summary] = list_recoveries()
    assert (summary.steps, summary.panes, summary.running) == (steps, 3, False)

    out = tmp_path / "recovered.jsonl"
    assert run_cli(["recover", logs[0].name, "--out", str(out)], monkeypatch) == 0
    stored = StoredSession.open(out)
    assert {p.id: [r.token_id for r in stored.pane_records(p.id)] for p in stored.panes} == held
