"""The HTML report: one self-contained page that parses as HTML, names every rule with a result, draws its plots
from the report's corpus figures (the numbers match, and match counts made here in plain Python), stays small for
many shards, and opens in a real browser (headless Chromium) with no console error and no network request.

Outside references: the HTML is parsed with the standard library's html.parser; screenshots are decoded with a
small PNG reader written from the PNG specification (W3C/ISO 15948: chunks, zlib stream, per-row filters 0-4);
the browser is Debian's ``chromium`` (installed by .ci/run when missing; the browser test is skipped only where
none can be found).
"""
from __future__ import annotations

import json
import os
import re
import shutil
import struct
import subprocess
import tempfile
import zlib
from html.parser import HTMLParser

import numpy as np
import pytest
from click.testing import CliRunner
from corpuscle.cli import main
from corpuscle.engine.scan import Report
from corpuscle.findings import Finding, Level
from corpuscle.report import html as html_report
from corpuscle.settings import Settings

from tests.shards import REPO, pack, run, write

SEQ_LEN = 16
EOS, PAD = 2, 0
#: Real tokens per row of the padded shard (document plus its eos); the rest of the window is padding.
REAL = [3, 5, 16, 9, 4, 16, 12, 2, 7, 16, 11, 6]


def padded_columns(real=REAL):
    """One document per row, right-padded with PAD to SEQ_LEN, an attention mask and shifted labels (-100 where
    the target is padding or past the row)."""
    ids, mask, labels = [], [], []
    for i, n in enumerate(real):
        doc = [10 + (i * 5 + j) % 40 for j in range(n - 1)] + [EOS]
        row = doc + [PAD] * (SEQ_LEN - n)
        ids.append(row)
        mask.append([1] * n + [0] * (SEQ_LEN - n))
        labels.append(doc[1:] + [-100] * (SEQ_LEN - n + 1))
    return {"input_ids": ids, "attention_mask": mask, "labels": labels}


def invoke(*args):
    result = CliRunner().invoke(main, [str(a) for a in args])
    assert result.exception is None or isinstance(result.exception, SystemExit), result.exc_info
    return result


# -- reading the page ------------------------------------------------------------------------------------------

VOID = {"area", "base", "br", "col", "embed", "hr", "img", "input", "link", "meta", "source", "track", "wbr"}


class Page(HTMLParser):
    """Every element with its attributes, text per SVG plot, and a check that the elements nest properly (each
    non-void start tag closed by its own end tag, in order)."""

    def __init__(self, text: str):
        super().__init__(convert_charrefs=True)
        self.elements: list[tuple[str, dict]] = []
        self.stack: list[str] = []
        self.errors: list[str] = []
        self.styles: list[str] = []
        self.plots: dict[str, dict] = {}  # svg id -> {"title", "x", "y", "bars": [(class, value, height)]}
        self._plot = None
        self._text_target = None
        self.feed(text)
        self.close()
        if self.stack:
            self.errors.append(f"unclosed: {self.stack}")

    def handle_starttag(self, tag, attrs):
        attrs = dict(attrs)
        self.elements.append((tag, attrs))
        if tag == "svg" and "plot" in attrs.get("class", ""):
            self._plot = self.plots.setdefault(attrs["id"], {"title": "", "x": "", "y": "", "bars": []})
        if self._plot is not None:
            cls = attrs.get("class", "")
            if tag == "rect" and cls.split()[:1] == ["bar"]:
                self._plot["bars"].append((cls, int(attrs["data-value"]), float(attrs["height"]), float(attrs["width"])))
            if tag == "text" and cls in ("x-label", "y-label"):
                self._text_target = cls[0]
            if tag == "title" and self.stack and self.stack[-1] == "svg":
                self._text_target = "title"
        if tag not in VOID:
            self.stack.append(tag)

    def handle_startendtag(self, tag, attrs):
        self.elements.append((tag, dict(attrs)))
        if self._plot is not None and tag == "rect" and dict(attrs).get("class", "").startswith("bar"):
            raise AssertionError("a bar without its tooltip")

    def handle_endtag(self, tag):
        if tag in VOID:
            return
        if not self.stack or self.stack[-1] != tag:
            self.errors.append(f"</{tag}> closes {self.stack[-1:] or 'nothing'}")
            return
        self.stack.pop()
        if tag == "svg":
            self._plot = None
        self._text_target = None

    def handle_data(self, data):
        if self.stack and self.stack[-1] == "style":
            self.styles.append(data)
        if self._plot is not None and self._text_target:
            self._plot[self._text_target] += data

    def values(self, plot_id: str, cls: str | None = None) -> list[int]:
        return [v for c, v, _, _ in self.plots[plot_id]["bars"] if cls is None or cls in c.split()]


def read(path) -> tuple[str, Page]:
    text = open(path, encoding="utf-8").read()
    page = Page(text)
    assert not page.errors, page.errors[:5]
    return text, page


OUTSIDE = re.compile(r"(?i)(https?:|//|file:)")


def assert_self_contained(text: str, page: Page) -> None:
    """Nothing outside the file: no reference in src, href or url(), no script, stylesheet link, image,
    frame or font."""
    for tag, attrs in page.elements:
        assert tag not in ("script", "link", "img", "iframe", "object", "embed", "image", "use"), tag
        for name in ("src", "href", "srcset", "xlink:href", "action", "poster", "data"):
            value = attrs.get(name)
            if value is not None:
                assert not OUTSIDE.search(value), (tag, name, value)
                assert value.startswith("#"), (tag, name, value)  # in-page anchors only
        assert "url(" not in (attrs.get("style") or "")
    css = "".join(page.styles)
    assert "url(" not in css and "@import" not in css and "@font-face" not in css
    for found in re.finditer(r"(?i)url\(([^)]*)\)", text):
        raise AssertionError(f"url() in the page: {found.group(0)}")


# -- tests on the written page ------------------------------------------------------------------------------------

@pytest.fixture
def padded(tmp_path):
    shard = write(tmp_path / "padded.parquet", padded_columns())
    out = tmp_path / "reports" / "padded.html"
    result = invoke("scan", shard, "--eos-id", EOS, "--pad-id", PAD, "--vocab-size", 64, "--html", out, "--jobs", 1,
                    "--json", tmp_path / "padded.json", "--fail-at", "never")
    assert result.exit_code == 0, result.output
    return out, json.loads((tmp_path / "padded.json").read_text())


def test_the_padded_shard_report_is_self_contained_parses_and_draws_the_figures_of_the_report(padded):
    out, report = padded
    text, page = read(out)
    assert_self_contained(text, page)
    assert os.listdir(out.parent) == ["padded.html"]  # written through a temporary file renamed into place
    m = report["metrics"]
    plots = page.plots
    # Four plots: document lengths, the token budget, padding per row, the label shift per row.
    assert {"plot-lengths-tokens", "plot-budget", "plot-padding", "plot-shift"} <= set(plots)
    for plot_id, plot in plots.items():
        assert plot["title"].strip() and plot["x"].strip() and plot["y"].strip(), plot_id

    # Document lengths: one document per row, REAL tokens each; every bar's number is the report's count.
    lengths = m["documentLengthHistogram"]["tokens"]
    assert lengths["documents"] == len(REAL) == sum(lengths["counts"])
    drawn = page.values("plot-lengths-tokens")
    assert sum(drawn) == len(REAL)
    first = next(i for i, n in enumerate(lengths["counts"]) if n)
    assert drawn == lengths["counts"][first:]
    edges = lengths["edges"]
    for a, b, n in zip(edges[:-1], edges[1:], lengths["counts"]):
        assert n == sum(1 for r in REAL if a <= r < b), (a, b)
    # No row is longer than its window (rows are the documents here), and the window is an edge of the bins.
    assert lengths["longerThanWindow"] == 0 and lengths["seqLen"] == [SEQ_LEN]
    assert SEQ_LEN + 1 in edges or edges[-1] <= SEQ_LEN + 1

    # Padding per row: rows by SEQ_LEN - real tokens, in power-of-two bins (int.bit_length gives the bin).
    pads = [SEQ_LEN - r for r in REAL]
    padding = m["paddingPerRow"]
    expected = [0] * len(padding["counts"])
    for p in pads:
        expected[p.bit_length()] += 1
    assert padding["counts"] == expected and padding["rows"] == len(REAL)
    assert padding["edges"][:5] == [0, 1, 2, 4, 8]
    assert page.values("plot-padding") == expected[next(i for i, n in enumerate(expected) if n):]

    # Label shift: every row is shifted by one.
    assert m["labelShiftRows"] == {"+1": len(REAL)}
    assert page.values("plot-shift") == [len(REAL)]

    # Token budget: real tokens and padding as built, then each layout's.
    built = m["tokenBudget"]["asBuilt"]
    assert built["realTokens"] == sum(REAL) and built["padding"] == sum(pads)
    budget = plots["plot-budget"]["bars"]
    assert [v for _, v, _, _ in budget[:3]] == [sum(REAL), sum(pads), 0]
    layouts = list(m["tokenBudget"]["layouts"].values())
    assert [v for _, v, _, _ in budget[3:]] == [x for lay in layouts for x in (lay["slots"] - lay["padding"],
                                                                               lay["padding"], lay["dropped"])]


def _assert_lengths_proportional(page: Page, plot_id: str, dimension: int) -> None:
    """The drawn length of every bar is its number times one scale."""
    bars = [(v, bar[dimension]) for _, v, *bar in page.plots[plot_id]["bars"] if v]
    top = max(bars)
    scale = top[1] / top[0]
    for value, length in bars:
        assert length == pytest.approx(value * scale, rel=0.01, abs=0.02), (plot_id, value, length)


def test_bar_heights_and_widths_show_their_numbers(padded):
    out, _ = padded
    _, page = read(out)
    for plot_id in ("plot-lengths-tokens", "plot-padding", "plot-shift"):
        _assert_lengths_proportional(page, plot_id, 0)  # heights
    _assert_lengths_proportional(page, "plot-budget", 1)  # widths


def test_the_demo_report_names_every_rule_with_a_result_and_draws_its_figures(tmp_path, monkeypatch):
    monkeypatch.chdir(REPO)
    out = tmp_path / "demo.html"
    result = invoke("scan", "fixtures/demo", "--config", "fixtures/demo.toml", "--html", out, "--json",
                    tmp_path / "demo.json", "--jobs", 1, "--quiet")
    assert result.exit_code == 1
    report = json.loads((tmp_path / "demo.json").read_text())
    text, page = read(out)
    assert_self_contained(text, page)
    with_result = {f["rule"] for f in report["findings"]}
    assert len(with_result) >= 10
    in_table = {attrs["data-rule"] for tag, attrs in page.elements if tag == "tbody" and "data-rule" in attrs}
    assert in_table == with_result
    heat = re.search(r'<table class="heat".*?</table>', text, re.S).group(0)
    assert all(f"<code>{rule}</code>" in heat for rule in with_result)
    m = report["metrics"]
    assert len(page.plots) >= 4
    for plot in page.plots.values():
        assert plot["title"].strip() and plot["x"].strip() and plot["y"].strip()
    for unit in ("tokens", "bytes"):
        h = m["documentLengthHistogram"][unit]
        assert sum(page.values(f"plot-lengths-{unit}")) == h["documents"] == sum(h["counts"])
    assert m["documentLengthHistogram"]["tokens"]["documents"] == m["documentTokens"]["documents"]
    assert m["documentLengthHistogram"]["bytes"]["documents"] == m["documentBytes"]["documents"]
    assert page.values("plot-shift") == [m["labelShiftRows"][k] for k in sorted(m["labelShiftRows"], key=int)]
    assert sum(page.values("plot-padding")) == m["paddingPerRow"]["rows"]
    # Duplicate clusters: the plotted clusters are the ones the findings list.
    for kind in ("exact", "near"):
        sizes = m[f"{kind}DuplicateClusterSizes"]
        drawn = page.values("plot-clusters", kind)
        assert sum(drawn) == sizes["clusters"] == sum(sizes["counts"])
        # every cluster is listed in its finding's evidence; near-duplicate sizes count distinct contents
        counts = [c["distinct" if kind == "near" else "members"] for f in report["findings"]
                  if f["rule"] == f"{kind}-duplicate" for c in f["evidence"]["clusterList"]]
        assert sizes["clusters"] == len(counts) and sizes["largest"] == max(counts)
        edges = sizes["edges"]
        assert sizes["counts"] == [sum(1 for c in counts if a <= c < b) for a, b in zip(edges[:-1], edges[1:])]
    assert m["exactDuplicateClusterSizes"]["clusters"] == m["exactDuplicates"]["groups"]
    assert m["nearDuplicateClusterSizes"]["clusters"] == m["nearDuplicates"]["clusters"]
    # Every finding's first location is shown as in the text summary: 'row 3, token 20', both 0-based.
    first = next(f for f in report["findings"] if f["rule"] == "token-range")
    inst = first["instances"][0]
    assert f"row {inst['row']:,}, token {inst['offset']:,}" in text
    # The inferred facts with their evidence, the settings in force, the version.
    assert 'id="inferred"' in text and "most common row length" in text
    assert re.search(r"<code>eos_id</code></td><td><code>2</code></td><td>config</td>", text)
    from corpuscle.version import __version__
    assert f"corpuscle {__version__}" in text


def test_overlong_documents_are_counted_beyond_the_window(tmp_path):
    # Packed rows of 8 with position restarts; documents of these lengths (plus eos each).
    docs = [list(range(10, 10 + n)) for n in (3, 9, 20, 6, 7, 11, 1)]  # 64 tokens with their eos: 8 full rows
    shard = write(tmp_path / "packed.parquet", pack(docs, 8, eos=EOS))
    report = run(shard, eos_id=EOS, seq_len=8)
    h = report.metrics["documentLengthHistogram"]["tokens"]
    lengths = [len(d) + 1 for d in docs]
    assert h["documents"] == len(docs) == sum(h["counts"])
    assert h["longerThanWindow"] == sum(1 for n in lengths if n > 8) == 3
    assert h["longerThanWindowFraction"] == pytest.approx(3 / 7)
    assert 9 in h["edges"]  # seq_len + 1: the bins right of it are exactly the documents beyond the window
    beyond = sum(n for a, n in zip(h["edges"], h["counts"]) if a >= 9)
    assert beyond == 3
    for a, b, n in zip(h["edges"][:-1], h["edges"][1:], h["counts"]):
        assert n == sum(1 for x in lengths if a <= x < b)
    page = Page(html_report.render(report).decode())
    assert sum(page.values("plot-lengths-tokens")) == len(docs)
    over = [v for c, v, _, _ in page.plots["plot-lengths-tokens"]["bars"] if "over" in c.split()]
    assert sum(over) == 3  # drawn in the colour of "beyond the window"


@pytest.mark.parametrize("pad", [PAD, EOS])
def test_padding_per_row_without_a_mask_is_read_from_the_pad_id(tmp_path, pad):
    cols = padded_columns()
    ids = [row[:n] + [pad] * (SEQ_LEN - n) for row, n in zip(cols["input_ids"], REAL)]
    shard = write(tmp_path / "nomask.parquet", {"input_ids": ids, "labels": cols["labels"]})
    report = run(shard, eos_id=EOS, pad_id=pad, only=("padding-loss",))
    # Each row's padding is the pad-id run at its end; when the pad id is the eos id, the first of that run is
    # the row's real eos (the rows here end in eos, then pad), so the run read as padding is the same length.
    expected = {}
    for n in REAL:
        p = SEQ_LEN - n
        expected[p.bit_length()] = expected.get(p.bit_length(), 0) + 1
    h = report.metrics["paddingPerRow"]
    assert h["rows"] == len(REAL)
    assert {k: n for k, n in enumerate(h["counts"]) if n} == expected
    assert report.metrics["padTokenFraction"] == pytest.approx(sum(SEQ_LEN - n for n in REAL) / (SEQ_LEN * len(REAL)))


def test_exact_duplicate_cluster_sizes_count_the_planted_copies(tmp_path):
    # Windows of 8 tokens: A three times, B twice, C four times, and six distinct windows.
    a, b, c = [3, 4, 5, 6, 7, 8, 9, 2], [9, 8, 7, 6, 5, 4, 3, 2], [11, 12, 13, 14, 15, 16, 17, 2]
    rows = [a, b, a, c, c, a, b, c, c] + [[20 + i, 30 + i, 40, 41, 42, 43, 44, 2] for i in range(6)]
    shard = write(tmp_path / "dup.parquet", {"input_ids": rows})
    report = run(shard, eos_id=EOS, only=("exact-duplicate",))
    sizes = report.metrics["exactDuplicateClusterSizes"]
    assert sizes["clusters"] == 3 and sizes["windows"] == 9 and sizes["largest"] == 4
    assert sizes["edges"][:4] == [2, 3, 4, 5] and sizes["counts"][:3] == [1, 1, 1] and sum(sizes["counts"]) == 3
    page = Page(html_report.render(report).decode())
    assert page.values("plot-clusters", "exact")[:3] == [1, 1, 1]


def test_html_in_the_config_file_writes_the_report(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    write("data/a.parquet", padded_columns())
    (tmp_path / "corpuscle.toml").write_text('eos_id = 2\npad_id = 0\nhtml = "out/report.html"\n')
    result = invoke("scan", "data", "--jobs", 1, "--fail-at", "never")
    assert result.exit_code == 0, result.output
    _, page = read(tmp_path / "out" / "report.html")
    assert "plot-padding" in page.plots
    (tmp_path / "corpuscle.toml").write_text("html = 3\n")
    result = invoke("scan", "data", "--jobs", 1)
    assert result.exit_code == 2 and "html must be the path" in result.output


def test_a_report_of_many_shards_stays_small(tmp_path):
    """12,000 shards with findings: the heat table keeps HEAT_SHARDS rows and adds the rest up; the findings table
    lists FINDINGS_PER_RULE per rule; the page stays well under a megabyte."""
    n = 12_000
    findings = [Finding("missing-separator", Level.error, "m", f"s/{i:05d}.parquet", "k", count=1 + i % 7,
                        rows=np.arange(3), offsets=np.arange(3)) for i in range(n)]
    findings += [Finding("empty-document", Level.warning, "e", f"s/{i:05d}.parquet", "k", count=2,
                         rows=np.arange(1), offsets=np.full(1, -1)) for i in range(0, n, 3)]
    findings.sort(key=Finding.sort_key)

    class Shard:
        pass

    report = Report(findings, [Shard()] * n, [], {"shards": n, "rows": 0, "tokens": 0, "seconds": 1.0}, [],
                    Settings())
    text = html_report.render(report).decode()
    assert len(text) < 600_000
    page = Page(text)
    assert not page.errors
    heat = re.search(r'<table class="heat".*?</table>', text, re.S).group(0)
    body = re.search(r"<tbody>(.*?)</tbody>", heat, re.S).group(1)
    rows = re.findall(r"<tr>(.*?)</tr>", body, re.S)
    assert len(rows) == html_report.HEAT_SHARDS + 1
    cells = lambda row: [int(v) for v in re.findall(r'data-value="(\d+)"', row)]  # noqa: E731
    total = sum(sum(cells(r)) for r in rows)
    assert total == sum(f.count for f in findings)  # nothing lost in the added-up row
    assert f"{n - html_report.HEAT_SHARDS:,} other shards" in rows[-1]
    listed = re.findall(r'<tr class="finding">', text)
    assert len(listed) == 2 * html_report.FINDINGS_PER_RULE
    assert f"{n - html_report.FINDINGS_PER_RULE:,} more finding(s) of missing-separator" in text


# -- in a real browser ---------------------------------------------------------------------------------------------

def _browser() -> str | None:
    for name in ("chromium", "chromium-browser"):
        path = shutil.which(name)
        if path:
            return path
    return None


def png_pixels(data: bytes) -> np.ndarray:
    """An 8-bit RGB or RGBA, non-interlaced PNG as an array (height, width, channels), per the PNG specification:
    IHDR, the concatenated IDAT zlib stream, then each row's filter (0 none, 1 sub, 2 up, 3 average, 4 Paeth)."""
    assert data[:8] == b"\x89PNG\r\n\x1a\n"
    pos, idat, header = 8, [], None
    while pos < len(data):
        length, kind = struct.unpack(">I4s", data[pos:pos + 8])
        body = data[pos + 8:pos + 8 + length]
        if kind == b"IHDR":
            header = struct.unpack(">IIBBBBB", body)
        elif kind == b"IDAT":
            idat.append(body)
        pos += 12 + length
    width, height, depth, colour, _, _, interlace = header
    assert depth == 8 and interlace == 0 and colour in (2, 6)
    bpp = 3 if colour == 2 else 4
    stride = width * bpp
    raw = zlib.decompress(b"".join(idat))
    out = bytearray(height * stride)
    prev = bytearray(stride)
    for y in range(height):
        f = raw[y * (stride + 1)]
        line = bytearray(raw[y * (stride + 1) + 1:(y + 1) * (stride + 1)])
        if f == 1:
            for i in range(bpp, stride):
                line[i] = (line[i] + line[i - bpp]) & 255
        elif f == 2:
            line = bytearray((a + b) & 255 for a, b in zip(line, prev))
        elif f == 3:
            for i in range(stride):
                left = line[i - bpp] if i >= bpp else 0
                line[i] = (line[i] + ((left + prev[i]) >> 1)) & 255
        elif f == 4:
            for i in range(stride):
                a = line[i - bpp] if i >= bpp else 0
                b = prev[i]
                c = prev[i - bpp] if i >= bpp else 0
                p = a + b - c
                pa, pb, pc = abs(p - a), abs(p - b), abs(p - c)
                line[i] = (line[i] + (a if pa <= pb and pa <= pc else b if pb <= pc else c)) & 255
        out[y * stride:(y + 1) * stride] = line
        prev = line
    return np.frombuffer(bytes(out), dtype=np.uint8).reshape(height, width, bpp)


def open_in_browser(browser: str, page: str, folder) -> dict:
    """Load ``page`` (a file) in headless Chromium: its screenshot (pixels), the DOM after load, the console
    messages, and the URLs the page itself asked the network for (from Chromium's net log: requests whose network
    isolation key is the file:// page; the browser's own background requests are not the page's)."""
    shot, netlog = os.path.join(folder, "shot.png"), os.path.join(folder, "net.json")
    with tempfile.TemporaryDirectory() as profile:
        done = subprocess.run(
            [browser, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
             "--disable-background-networking", "--disable-component-update", "--disable-sync",
             f"--user-data-dir={profile}", "--host-resolver-rules=MAP * ~NOTFOUND", "--enable-logging=stderr",
             "--v=0", f"--log-net-log={netlog}", "--window-size=900,700", f"--screenshot={shot}", "--dump-dom",
             "file://" + os.path.abspath(page)],
            capture_output=True, text=True, timeout=120)
    assert os.path.exists(shot), done.stderr[-2000:]
    with open(netlog) as fh:
        log = json.load(fh)
    names = {v: k for k, v in log["constants"]["logEventTypes"].items()}
    requested = [e["params"]["url"] for e in log["events"]
                 if names.get(e["type"]) == "URL_REQUEST_START_JOB" and "url" in e.get("params", {})
                 and "file://" in e["params"].get("network_isolation_key", "")]
    with open(shot, "rb") as fh:
        pixels = png_pixels(fh.read())
    console = [line for line in done.stderr.splitlines() if ":CONSOLE" in line]
    return {"dom": done.stdout, "pixels": pixels, "console": console, "requested": requested}


@pytest.fixture(scope="module")
def browser():
    path = _browser()
    if path is None:
        pytest.skip("no chromium on PATH: install Debian's chromium package (.ci/run does when apt-get is there) "
                    "to check the HTML report in a real browser")
    return path


def test_the_browser_check_sees_console_errors_and_network_requests(browser, tmp_path):
    # The detectors themselves: a page with a planted console message and an image from the network.
    page = tmp_path / "planted.html"
    page.write_text('<!DOCTYPE html><html><body><p>x</p><img src="http://127.0.0.1:9/x.png">'
                    '<script>console.error("planted")</script></body></html>')
    seen = open_in_browser(browser, page, tmp_path)
    assert any("planted" in line for line in seen["console"])
    assert seen["requested"] == ["http://127.0.0.1:9/x.png"]


@pytest.mark.parametrize("which", ["demo", "padded"])
def test_the_report_opens_in_headless_chromium(browser, tmp_path, which, monkeypatch):
    if which == "demo":
        monkeypatch.chdir(REPO)
        out = tmp_path / "demo.html"
        invoke("scan", "fixtures/demo", "--config", "fixtures/demo.toml", "--html", out, "--json",
               tmp_path / "r.json", "--jobs", 1, "--quiet")
    else:
        shard = write(tmp_path / "padded.parquet", padded_columns())
        out = tmp_path / "padded.html"
        invoke("scan", shard, "--eos-id", EOS, "--pad-id", PAD, "--html", out, "--json", tmp_path / "r.json",
               "--jobs", 1)
    report = json.loads((tmp_path / "r.json").read_text())
    seen = open_in_browser(browser, out, tmp_path)
    assert seen["console"] == []
    assert seen["requested"] == []
    pixels = seen["pixels"]
    assert pixels.shape[:2] == (700, 900)
    background = pixels[0, 0]
    differs = np.any(pixels != background, axis=2)
    assert differs.mean() > 0.05  # text, the verdict banner and the table: not a blank page
    # The verdict banner is drawn in the first screen: FAIL in the page's red (#c62828), PASS in its green (#2e7d32).
    colour = [0xC6, 0x28, 0x28] if report["exitCode"] else [0x2E, 0x7D, 0x32]
    banner = np.all(pixels[:, :, :3] == np.array(colour, dtype=np.uint8), axis=2)
    assert banner.sum() > 5_000
    dom = Page(seen["dom"])
    assert any(tag == "table" and attrs.get("id") == "findings" for tag, attrs in dom.elements)
    assert len(dom.plots) >= 4
    rules = {attrs["data-rule"] for tag, attrs in dom.elements if tag == "tbody" and "data-rule" in attrs}
    assert rules == {f["rule"] for f in report["findings"]}
