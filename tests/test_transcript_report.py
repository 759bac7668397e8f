"""Reports: a self-contained HTML file (parsed, and rendered by a real headless Chromium)
and a Markdown file with the same facts; the shared token scheme behind both.

Outside references: Python's html.parser for the structure; the PNG specification
(ISO/IEC 15948:2004, sec. 5.2 signature and sec. 11.2.2 IHDR) for the images; Chromium
for rendering; perplexity as exp of the mean negative log-likelihood (Jelinek et al.
1977), worked by hand on the sample's probabilities (powers of 1/2).
"""

from __future__ import annotations

import base64
import shutil
import struct
import subprocess
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest
from transcript_fakes import run_cli, sample_header, write_sample

from tui import token_style as ts
from tui.reports.gather import gather
from tui.reports.report import kind_of, write_report
from tui.transcripts.reader import StoredSession

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # ISO/IEC 15948 sec. 5.2


def png_size(data: bytes) -> tuple[int, int]:
    assert data[:8] == PNG_SIGNATURE
    assert data[12:16] == b"IHDR"  # the first chunk (sec. 11.2.2)
    return struct.unpack(">II", data[16:24])


class Collect(HTMLParser):
    def __init__(self) -> None:
        super().__init__()
        self.tags: list[tuple[str, dict]] = []
        self.text: list[str] = []

    def handle_starttag(self, tag, attrs):
        self.tags.append((tag, dict(attrs)))

    def handle_data(self, data):
        self.text.append(data)


@pytest.fixture(scope="module")
def html_report(tmp_path_factory) -> Path:
    folder = tmp_path_factory.mktemp("report")
    session = StoredSession.open(write_sample(folder / "sample.jsonl"))
    return write_report(session, folder / "report.html")


def test_the_html_is_self_contained_and_names_every_pane(html_report):
    parser = Collect()
    parser.feed(html_report.read_text(encoding="utf-8"))
    tags = [t for t, _ in parser.tags]
    assert "script" not in tags and "link" not in tags and "iframe" not in tags
    for tag, attrs in parser.tags:
        for key in ("src", "href", "action", "srcset"):
            if key in attrs:  # only embedded data or in-page anchors
                assert attrs[key].startswith(("data:", "#")), (tag, attrs)
    assert "url(" not in html_report.read_text()  # no CSS fetches either
    heads = {a.get("id") for t, a in parser.tags if t == "h3"}
    for pane in sample_header().panes:
        assert f"pane-{pane.id}" in heads
    text = "".join(parser.text)
    assert "greedy" in text and "temperature=1.5" in text and "hand-made" in text
    for band in ts.RANK_BANDS + ts.FINAL_BANDS:  # the app's legend, every band
        assert band.label in text
    [img] = [a for t, a in parser.tags if t == "img"]
    png = base64.b64decode(img["src"].split(",", 1)[1])
    assert png_size(png) == (960, 720)  # the figure: 10 x 7.5 in at 96 dpi


def test_tokens_carry_the_shared_scheme_classes(html_report):
    html = html_report.read_text()
    # Pane 1, step 0: rank 4 (band "2-10", index 1), final p 1/8 (band "5-50%", index 1),
    # forced -> the forced class; step 1: rank 1, p 1/2 -> band 0, ">=50%" -> "t001"
    # (the second token of a pane has the alternate shade).
    assert ts.rank_band(4) == 1 and ts.final_band(0.125) == 1
    assert 'class="tf0" title="warm · step 0' in html
    assert 'class="t001" title="warm · step 1' in html
    colours = ts.token_colours(1, 0.5, alternate=True)
    assert f".t001 {{ color: {colours.foreground}; background: {colours.background}; }}" in html
    # a long shot (band 2) at < 5% (band 2): bold, underlined, in italics, in the deep ink
    deep = ts.band_colours(2, 2)
    assert (f".t220 {{ color: {deep.foreground}; background: {deep.background}; "
            "font-weight: 700; text-decoration: underline; font-style: italic; }") in html


def test_perplexity_matches_the_hand_computed_value(html_report, tmp_path):
    # Pane 0: p = 1/2, 1/4, 1/2 -> mean ln p = -(4/3) ln 2 -> perplexity 2^(4/3) = 2.5198.
    # Pane 1: p = 1/8, 1/2, 1/4 -> mean ln p = -2 ln 2 -> perplexity 4.
    report = gather(StoredSession.open(write_sample(tmp_path / "s.jsonl")))
    assert report.panes[0].perplexity == pytest.approx(2 ** (4 / 3))
    assert report.panes[1].perplexity == pytest.approx(4.0)
    html = html_report.read_text()
    assert "perplexity 2.52" in html and "perplexity 4.00" in html


def test_the_markdown_report_has_the_same_facts(tmp_path, monkeypatch):
    path = write_sample(tmp_path / "s.jsonl")
    out = tmp_path / "r.md"
    assert run_cli(["report", str(path), "--out", str(out)], monkeypatch) == 0
    md = out.read_text()
    assert md.startswith("# Two panes by hand\n")
    assert "| greedy (id 0) | `greedy` | from the prompt | length | 3 | -0.924 | 2.52 |" in md
    assert "| warm (id 1) | `temperature=1.5` | from the prompt | length | 3 | -1.386 | 4.00 |" in md
    assert "```text\n a time,\n```" in md and "```text\n the sea!\n```" in md
    assert "| 0 | `␣a` r1 0.50 | `␣the` r4 0.12 (by hand) |" in md
    assert "| 2 | `!` | 32 | 2 | 0.2500 | 0.2500 | 2 | 0.500 | 0.250 | length |" in md


def test_both_reports_name_the_prompts_a_session_ran_before_an_edit(tmp_path, monkeypatch):
    from dataclasses import replace

    from transcript_fakes import sample_records

    from tui.files import write_atomic
    from tui.session.scenario import EarlierSetup
    from tui.transcripts.format import transcript_lines

    earlier = (EarlierSetup(7, "Once upon a tide", (), 40, ("END",)),
               EarlierSetup(0, None, (("user", "Name the ferry."),), 12, ()))
    head = replace(sample_header(), prompt_edits=earlier)
    path = write_atomic(tmp_path / "e.jsonl", transcript_lines(head, sample_records()))
    lines = ["1. ran 7 step(s) with the prompt 'Once upon a tide', at most 40 new tokens, stop "
             "strings 'END'; then the prompt was edited and the session restarted",
             "2. ran 0 step(s) with the prompt '[user] Name the ferry.', at most 12 new tokens, "
             "stop strings none; then the prompt was edited and the session restarted"]
    for suffix in (".md", ".html"):
        out = tmp_path / f"e{suffix}"
        assert run_cli(["report", str(path), "--out", str(out)], monkeypatch) == 0
        text = out.read_text()
        for line in lines:
            assert (line if suffix == ".md" else line.replace("'", "&#x27;")) in text, (suffix, line)
    plain = tmp_path / "plain.md"
    assert run_cli(["report", str(write_sample(tmp_path / "p.jsonl")), "--out", str(plain)],
                   monkeypatch) == 0
    assert "Earlier prompts" not in plain.read_text()


def test_both_reports_draw_the_apps_parting_marks(tmp_path, monkeypatch):
    from tui.session.parting import PART, TextMark, compared_with, text_marks
    from tui.workbench.replay_source import session_view

    path = write_sample(tmp_path / "s.jsonl")
    stored = StoredSession.open(path)
    report = gather(stored)
    # reference: the marks the app draws on the same session, replayed
    view = session_view(stored.header, {p.id: list(stored.pane_records(p.id)) for p in stored.panes})
    for pane, live in zip(report.panes, view.panes, strict=True):
        assert report.marks(pane) == text_marks(live, compared_with(live, view.panes))
    # worked by hand: "warm" chose token 30 at step 0 where "greedy" chose 20
    assert report.marks(report.panes[1]) == (TextMark(0, PART, "leaves greedy here"),)
    assert report.marks(report.panes[0]) == ()
    md, html = tmp_path / "r.md", tmp_path / "r.html"
    for out in (md, html):
        assert run_cli(["report", str(path), "--out", str(out)], monkeypatch) == 0
    assert "Marks: \u2260 step 0: leaves greedy here." in md.read_text()
    assert md.read_text().count("Marks:") == 1
    page = html.read_text()
    assert '<span class="part" title="leaves greedy here">\u2260</span><span class="mark">' in page


def test_report_defaults_and_bad_suffix(tmp_path, monkeypatch, capsys):
    path = write_sample(tmp_path / "s.jsonl")
    assert run_cli(["report", str(path)], monkeypatch) == 0
    assert (tmp_path / "s.html").is_file()
    assert run_cli(["report", str(path), "--out", "-"], monkeypatch) == 0
    assert capsys.readouterr().out.startswith("# Two panes by hand")
    assert run_cli(["report", str(path), "--out", str(tmp_path / "r.pdf")], monkeypatch) == 2
    assert "give a file ending in .html or .md" in capsys.readouterr().err
    assert kind_of("x.HTM") == "html"


CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")


@pytest.mark.skipif(CHROMIUM is None, reason="no chromium on this machine (Debian package "
                    "`chromium`); the HTML report is still checked by the parser tests")
def test_a_headless_chromium_renders_the_report(html_report, tmp_path):
    shot = tmp_path / "shot.png"
    cmd = [CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu",
           "--disable-background-networking", "--disable-component-update", "--disable-sync",
           "--no-first-run", f"--user-data-dir={tmp_path / 'profile'}",
           f"--screenshot={shot}", "--window-size=1200,900", html_report.as_uri()]
    subprocess.run(cmd, capture_output=True, timeout=120, check=False)
    assert shot.is_file(), "chromium wrote no screenshot"
    data = shot.read_bytes()
    assert png_size(data) == (1200, 900)
    assert len(data) > 30_000  # a blank or error page compresses to a few KB
    import matplotlib.image

    pixels = (matplotlib.image.imread(str(shot))[:, :, :3] * 255).round().astype(int)
    rgb = pixels.reshape(-1, 3)
    pane_bg = np.array(ts.rgb(ts.PANE_BACKGROUND))
    assert (np.abs(rgb - pane_bg).max(axis=1) <= 2).mean() > 0.02  # the inline CSS applied
    assert len(np.unique(rgb, axis=0)) > 100  # text, colours and antialiasing, not a flat page


# ----- the shared scheme ------------------------------------------------------------------------

def test_band_edges_and_blend_worked_by_hand():
    assert [ts.rank_band(r) for r in (1, 2, 3, 4, 10, 11, 50, 51, 10**6)] == [0, 1, 1, 1, 1, 2, 2, 2, 2]
    assert [ts.final_band(p) for p in (1.0, 0.5, 0.4999, 0.05, 0.0499, 0.0)] == [0, 0, 1, 1, 2, 2]
    assert ts.blend("#ffffff", "#000000", 0.5) == "#808080"  # 127.5 rounds to 128 (half even)
    assert ts.blend("#E69F00", "#16181c", 0.0) == "#16181c"
    with pytest.raises(ValueError):
        ts.rank_band(0)


def test_the_apps_colouring_uses_the_same_bands_and_colours():
    from tui.app import colouring

    assert colouring.RANK_BANDS == ts.RANK_BANDS and colouring.FINAL_BANDS == ts.FINAL_BANDS
    combos = [(rank, p, alt, forced, depth) for rank in (1, 2, 4, 11, 51)
              for p in (0.9, 0.2, 0.01) for alt in (False, True) for forced in (False, True)
              for depth in ts.DEPTHS]
    for rank, p, alt, forced, depth in combos:
        style = colouring.Scheme(depth).token_style(rank, p, alternate=alt, forced=forced)
        ours = ts.token_colours(rank, p, alternate=alt, forced=forced, depth=depth)
        assert style.bgcolor.get_truecolor().hex == ours.background.lower()
        assert style.color.get_truecolor().hex == ours.foreground.lower()
        assert (bool(style.bold), bool(style.underline), bool(style.italic)) == \
            (ours.bold, ours.underline, ours.italic)
