"""The client report rendered with Qt: self-contained HTML, PDF, the longrun report command.

Escaping is checked with a hostile state id: a state called
``<script>alert(1)</script>`` must come out as text, and the HTML must hold no
``<script`` tag anywhere (common practice for HTML output of user text).
"""
import os

os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")

import base64  # noqa: E402
import hashlib  # noqa: E402
import re  # noqa: E402
import shutil  # noqa: E402
import subprocess  # noqa: E402
from datetime import datetime, timezone  # noqa: E402
from pathlib import Path  # noqa: E402

import pytest  # noqa: E402

from core.cli import main  # noqa: E402
from core.io import save_chain  # noqa: E402
from core.model import Chain, State, Step, Transition  # noqa: E402
from core.plan import Plan  # noqa: E402
from core.report import BarChart, LineChart, build_report  # noqa: E402

REPO = Path(__file__).resolve().parents[2]
CREDIT = REPO / "sample_models" / "credit_eras.json"
WHEN = datetime(2024, 5, 6, 7, 8, tzinfo=timezone.utc)
EVIL = "<script>alert(1)</script>"


def hostile_chain() -> Chain:
    return Chain(
        states=(State(EVIL, label="<b>bold</b> & <img src=x onerror=alert(2)>", x=0.0, y=0.0),
                State("safe", x=160.0, y=0.0)),
        transitions=(Transition(EVIL, "safe", "0.4"), Transition(EVIL, EVIL, "rest"),
                     Transition("safe", EVIL, "0.2"), Transition("safe", "safe", "rest")),
        name="Name with </title><script>alert(3)</script>",
        description='Description "quoted" <iframe src="http://example.invalid"></iframe>',
        step=Step(1, "hour"),
    )


def decoded_images(html_text: str) -> list[bytes]:
    return [base64.b64decode(m) for m in re.findall(r'src="data:image/svg\+xml;base64,([A-Za-z0-9+/=]+)"', html_text)]


def test_html_escapes_user_text_and_has_no_script(qapp):
    from app.report import render_html

    rep = build_report(hostile_chain(), plan=Plan(EVIL, 30), generated=WHEN)
    text = render_html(rep)
    assert "<script" not in text.lower()
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in text
    assert "&lt;b&gt;bold&lt;/b&gt; &amp; &lt;img src=x onerror=alert(2)&gt;" in text
    assert "&lt;iframe src=&quot;http://example.invalid&quot;&gt;" in text
    assert "<iframe" not in text and "<img src=x" not in text
    # the embedded pictures (chain and charts) are SVG text in which the names are escaped too
    images = decoded_images(text)
    assert len(images) >= 4   # chain picture, long-run law, plan bars, distance curve
    for svg in images:
        assert b"<script" not in svg.lower()
    assert any(b"&lt;script&gt;alert(1)&lt;/script&gt;" in svg for svg in images)


def test_html_is_self_contained(qapp):
    from app.report import render_html

    text = render_html(build_report(hostile_chain(), generated=WHEN))
    assert text.startswith("<!DOCTYPE html>")
    assert "Content-Security-Policy" in text and "default-src 'none'" in text
    assert all(src.startswith("data:") for src in re.findall(r'\ssrc="([^"]*)"', text))
    assert all(href.startswith("#") for href in re.findall(r'\shref="([^"]*)"', text))
    assert "<link" not in text and "@import" not in text and "url(" not in text


def test_html_report_of_a_sample_tells_the_plan_story(qapp):
    from app.report import render_html
    from core.io import load_chain

    rep = build_report(load_chain(CREDIT), plan=Plan("boom_a", 240), source=CREDIT.name,
                       sha256=hashlib.sha256(CREDIT.read_bytes()).hexdigest(), generated=WHEN)
    text = render_html(rep)
    for heading in ("The model", "Validation", "Classes and periods", "Long-run law", "Mixing time",
                    "Findings", "The simulation plan", "How far off it is", "How long it must run instead",
                    "Caution"):
        assert f">{heading}<" in text, heading
    assert "Verdict: misleading" in text
    assert hashlib.sha256(CREDIT.read_bytes()).hexdigest() in text
    assert "2024-05-06 07:08" in text


def test_charts_render_with_their_labels(qapp):
    from app.report import chart_image, chart_svg

    rep = build_report(Chain.from_matrix([[0.9, 0.1], [0.5, 0.5]], ["on", "off"]), plan=Plan("on", 3),
                       generated=WHEN)
    for chart in list(rep.blocks(BarChart)) + list(rep.blocks(LineChart)):
        svg = chart_svg(chart)
        assert svg.startswith(b"<?xml") and b"</svg>" in svg
        assert chart.y_label.encode() in svg
        img = chart_image(chart, scale=1.0)
        assert not img.isNull()
        colours = {img.pixel(x, y) for x in range(0, img.width(), 7) for y in range(0, img.height(), 7)}
        assert len(colours) > 4   # axes, bars or curve, labels: not a blank image


def test_chain_picture_is_the_editor_scene(qapp):
    from app.report import chain_picture_image, chain_picture_svg

    chain = hostile_chain()
    svg, w, h = chain_picture_svg(chain)
    assert w > 0 and h > 0
    # the editor shows a state's label when it has one; user text is escaped in the SVG
    assert b">safe<" in svg and b"&lt;b&gt;bold&lt;/b&gt; &amp; &lt;img" in svg
    assert b"<b>" not in svg and b"<img" not in svg
    img = chain_picture_image(chain)
    assert img.width() > 100 and img.height() > 50
    # an invalid chain is drawn too (with its problem marks)
    broken = chain.with_transition("safe", EVIL, "0.9").with_transition("safe", "safe", "0.9")
    assert broken.problems
    svg2, _, _ = chain_picture_svg(broken)
    assert b"!" in svg2


@pytest.fixture(scope="module")
def credit_pdf(tmp_path_factory):
    from app.report import _ensure_app, export_report
    from core.io import load_chain

    _ensure_app()
    out = tmp_path_factory.mktemp("pdf") / "credit.pdf"
    sha = hashlib.sha256(CREDIT.read_bytes()).hexdigest()
    done = export_report(load_chain(CREDIT), out, plan=Plan("boom_a", 240), source=CREDIT.name, sha256=sha,
                         generated=WHEN)
    return out, done, sha


def test_pdf_export_is_a_paged_pdf(qapp, credit_pdf):
    out, done, _sha = credit_pdf
    data = out.read_bytes()
    assert data.startswith(b"%PDF-") and data.rstrip().endswith(b"%%EOF")
    assert done["format"] == "pdf" and done["pages"] >= 3 and done["verdict"] == "misleading"
    assert len(re.findall(rb"/Type\s*/Page[^s]", data)) == done["pages"]


@pytest.mark.skipif(shutil.which("pdftotext") is None, reason="pdftotext (poppler-utils) is not installed")
def test_pdf_pages_carry_the_footer(qapp, credit_pdf):
    out, done, sha = credit_pdf
    txt = subprocess.run(["pdftotext", "-layout", str(out), "-"], capture_output=True, text=True, check=True).stdout
    pages = [p for p in txt.split("\f") if p.strip()]
    assert len(pages) == done["pages"]
    for k, page in enumerate(pages):
        assert f"page {k + 1} of {done['pages']}" in page
        assert f"SHA-256 {sha}" in page
        assert "Longrun" in page and "2024-05-06 07:08" in page
    assert "Verdict: misleading" in txt and "licensed practice" in txt


def test_export_refuses_a_bad_suffix_and_oversize_output(qapp, tmp_path):
    from app.report import export_report
    from core.errors import LimitError, OptionError

    chain = Chain.from_matrix([[0.9, 0.1], [0.5, 0.5]], ["on", "off"])
    with pytest.raises(OptionError, match=r"must end in \.html or \.pdf"):
        export_report(chain, tmp_path / "x.docx")
    with pytest.raises(LimitError, match=r"limit of 0\.01 MiB.*--max-size-mb"):
        export_report(chain, tmp_path / "x.html", max_mb=0.01)
    assert not (tmp_path / "x.html").exists()


def test_document_report_hashes_the_saved_file(qapp, tmp_path):
    from app.document import Document
    from app.report import export_document_report
    from core.io import load_chain

    path = tmp_path / "two.json"
    save_chain(Chain.from_matrix([[0.9, 0.1], [0.5, 0.5]], ["on", "off"], name="Two"), path)
    doc = Document()
    doc.reset(load_chain(path), path)
    out = tmp_path / "two.html"
    export_document_report(doc, out, plan=Plan("on", 4))
    text = out.read_text(encoding="utf-8")
    assert hashlib.sha256(path.read_bytes()).hexdigest() in text
    doc.rename_state("off", "down")   # an unsaved edit: the hash is of the current content
    export_document_report(doc, out)
    text = out.read_text(encoding="utf-8")
    assert hashlib.sha256(path.read_bytes()).hexdigest() not in text
    assert "with unsaved edits" in text and ">down<" in text


# --------------------------------------------------------------------------
# the command line
# --------------------------------------------------------------------------
def test_cli_writes_html_and_reports_the_verdict(qapp, tmp_path, capsys):
    out = tmp_path / "r.html"
    assert main(["report", str(CREDIT), "--steps", "240", "--start", "boom_a", "-o", str(out)]) == 0
    said = capsys.readouterr().out
    assert f"wrote {out}" in said and "plan misleading" in said
    assert "Verdict: misleading" in out.read_text(encoding="utf-8")


def test_cli_reports_an_invalid_chain_instead_of_failing(qapp, tmp_path, capsys):
    bad = tmp_path / "bad.json"
    save_chain(Chain(states=(State("a"), State("b")),
                     transitions=(Transition("a", "b", "0.5"), Transition("b", "a", "1"))), bad)
    out = tmp_path / "bad.html"
    assert main(["report", str(bad), "--steps", "10", "-o", str(out)]) == 0
    captured = capsys.readouterr()
    assert "not valid" in captured.err and "model not valid" in captured.out
    text = out.read_text(encoding="utf-8")
    assert "The model is not valid" in text and "probabilities sum to 0.5 (must be 1)" in text


@pytest.mark.parametrize("argv, message", [
    (["-o", "r.txt"], "must end in .html or .pdf"),
    (["--burn-in", "5", "-o", "r.html"], "--burn-in describes a simulation plan and need --steps"),
    (["--steps", "10", "--stride", "2", "-o", "r.html"], "--stride applies to the time average only"),
    (["--steps", "10", "--start", "nowhere", "-o", "r.html"], "--start 'nowhere': no such state"),
    (["--max-size-mb", "0.001", "-o", "r.html"], "more than the limit of"),
    (["-o", "no/such/folder/r.html"], "does not exist"),
])
def test_cli_refuses_bad_options_with_exit_2(qapp, tmp_path, capsys, monkeypatch, argv, message):
    monkeypatch.chdir(tmp_path)
    assert main(["report", str(CREDIT), *argv]) == 2
    assert message in capsys.readouterr().err
    assert not any(tmp_path.glob("r.*"))
