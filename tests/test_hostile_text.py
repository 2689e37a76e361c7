"""Hostile text in the inputs, and safe handling of inputs in the package.

Station, operator and town names of a copy of the reduced demo are replaced by HTML/JS payloads,
template syntax, a 5,000-character string, right-to-left (Arabic, Hebrew) text and emoji; the
station table stays valid otherwise. The demo is then run through the real CLI and **every**
``*.html`` file in the output folder is checked (so outputs added later are covered):

* statically: the markup of a payload never appears as markup (parsed with html.parser: no
  element or event-handler attribute from the data);
* in headless Chromium with networking off (tests/browser_support.py): no dialog fires, no
  injected element exists (no ``img[src=x]``, no element with an ``on*`` attribute, no
  ``javascript:`` link, no extra ``<script>``), and — on pages with the station search — each
  hostile station found by its id opens a popup whose textContent is the payload, verbatim.

Safe handling: configs are parsed with tomllib only, nothing in pipeline/ evaluates, executes or
unpickles input, and a config string that is Python code stays a string. Names are invented.
"""

from __future__ import annotations

import csv
import html.parser
import json
import re
import shutil
from pathlib import Path

import pandas as pd
import pyogrio
import pytest
from browser_support import launch_browser, open_local_html, require_browser
from conftest import REPO, SMALL_DEMO, run_cli

import pipeline.io as pio
from pipeline.config import load_config
from pipeline.errors import ConfigError

IMG = "<img src=x onerror=alert(1)>"
SCRIPT = "</script><script>alert(1)</script>"
SVG = '"><svg onload=alert(1)>'
JS_URL = "javascript:alert(1)"
TEMPLATE = "${alert(1)} `${1+1}` <%= 7*7 %>"  # JS/ERB template syntax (Jinja: see below)
COMMENT = "<!-- x --> & &amp; 'quoted' \"double\""
LINE_SEPARATORS = "Nord\u2028Station\u2029Halt"
LONG = ("Long name " + "\u0398\u03c9 ") * 416 + "end"  # 5,000+ characters
ARABIC = "\u0645\u062d\u0637\u0629 \u0648\u0642\u0648\u062f \u0627\u0644\u062c\u0628\u0644"
HEBREW = "\u05ea\u05d7\u05e0\u05ea \u05d3\u05dc\u05e7 \u05d4\u05e8"
EMOJI = (
    "\u26fd Pump \U0001f3d4\ufe0f \U0001f697\U0001f4a8 \U0001f468\u200d\U0001f469\u200d\U0001f467"
)

#: station_id -> (name, operator) put into the demo's stations table.
HOSTILE_STATIONS = {
    "ST-0001": (IMG, SCRIPT),
    "ST-0002": (SCRIPT, SVG),
    "ST-0003": (SVG, JS_URL),
    "ST-0004": (JS_URL, IMG),
    "ST-0005": (TEMPLATE, COMMENT),
    "ST-0006": (LONG, LONG[:300]),
    "ST-0007": (ARABIC, HEBREW),
    "ST-0008": (HEBREW + " " + EMOJI, ARABIC),
    "ST-0009": (EMOJI, TEMPLATE),
    "ST-0010": (LINE_SEPARATORS, COMMENT),
}
#: Town names (prefixed so that the search finds each one alone).
HOSTILE_TOWNS = [f"Town{k} {p}" for k, p in enumerate((IMG, SCRIPT, SVG, ARABIC, EMOJI))]
#: A rejected row (no latitude) whose name and reason carry a payload.
REJECTED_ID = "ST-HOSTILE-REJ"
#: Markup that must never reach a page as markup.
MARKUP = (IMG, SCRIPT, "<svg onload=alert(1)>", "<script>alert(1)</script>")


def _hostile_copy(src: Path, dst: Path) -> None:
    shutil.copytree(src, dst)
    path = dst / "stations.csv"
    with open(path, encoding="utf-8", newline="") as f:
        reader = csv.DictReader(f)
        fields = list(reader.fieldnames or [])
        rows = list(reader)
    found = set()
    for row in rows:
        if row["station_id"] in HOSTILE_STATIONS:
            row["name"], row["operator"] = HOSTILE_STATIONS[row["station_id"]]
            found.add(row["station_id"])
    assert found == set(HOSTILE_STATIONS), "demo stations changed: pick other ids"
    bad = dict(rows[0], station_id=REJECTED_ID, name=SCRIPT + " " + IMG, lat="north " + SVG)
    rows.append(bad)
    with open(path, "w", encoding="utf-8", newline="") as f:
        w = csv.DictWriter(f, fieldnames=fields)
        w.writeheader()
        w.writerows(rows)
    towns = pyogrio.read_dataframe(dst / "towns.gpkg")
    for k, name in enumerate(HOSTILE_TOWNS):
        towns.loc[k, "name"] = name
    pyogrio.write_dataframe(towns, dst / "towns.gpkg", layer="towns")


@pytest.fixture(scope="module")
def hostile_run(small_demo_inputs, tmp_path_factory) -> Path:
    root = tmp_path_factory.mktemp("hostile")
    _hostile_copy(small_demo_inputs, root / "cache" / small_demo_inputs.name)
    out = root / "out"
    proc = run_cli("demo", *SMALL_DEMO, "--out", str(out), "--cache-dir", str(root / "cache"))
    assert proc.returncode == 0, proc.stderr
    return out


def _pages(out: Path) -> list[Path]:
    pages = sorted(p for p in out.glob("*.html") if not p.name.startswith("."))
    assert any(p.name == "map.html" for p in pages)
    return pages


class _Markup(html.parser.HTMLParser):
    """Collects elements and attributes as a browser's parser would see them."""

    def __init__(self) -> None:
        super().__init__(convert_charrefs=True)
        self.tags: list[tuple[str, dict[str, str | None]]] = []

    def handle_starttag(self, tag, attrs):
        self.tags.append((tag, dict(attrs)))


def test_outputs_keep_the_text_verbatim(hostile_run) -> None:
    st = pyogrio.read_dataframe(hostile_run / "altigrade.gpkg", layer="stations")
    by_id = st.set_index("station_id")
    for sid, (name, operator) in HOSTILE_STATIONS.items():
        assert by_id.loc[sid, "name"] == name
        assert by_id.loc[sid, "operator"] == operator
    rj = pyogrio.read_dataframe(hostile_run / "altigrade.gpkg", layer="rejected_stations")
    row = rj[rj["station_id"] == REJECTED_ID].iloc[0]
    assert row["name"] == SCRIPT + " " + IMG
    assert "\n" not in row["reject_reason"] and "lat is not a number" in row["reject_reason"]


def test_no_payload_markup_in_any_page_source(hostile_run) -> None:
    for page in _pages(hostile_run):
        text = page.read_text(encoding="utf-8")
        for m in MARKUP:
            assert m not in text, (page.name, m)
        parser = _Markup()
        parser.feed(text)
        for tag, attrs in parser.tags:
            assert not (tag == "img" and attrs.get("src") == "x"), page.name
            assert tag != "svg" or "onload" not in attrs, page.name
            for k, v in attrs.items():
                assert not (k.startswith("on") and v and "alert(1)" in v), (page.name, tag, k)
                if k in ("href", "src", "action", "formaction") and v:
                    assert not v.strip().lower().startswith("javascript:"), (page.name, k, v)


def test_template_syntax_is_not_evaluated(hostile_run) -> None:
    st = pyogrio.read_dataframe(hostile_run / "altigrade.gpkg", layer="stations")
    assert TEMPLATE in set(st["name"])
    for page in _pages(hostile_run):
        text = page.read_text(encoding="utf-8")
        assert "`2`" not in text and "<%= 49" not in text, page.name


def test_jinja_syntax_in_names_is_not_evaluated(small_demo_inputs, tmp_path) -> None:
    """Names with Jinja syntax must reach the pages verbatim. Before the fix, branca re-renders
    the map's data block as a Jinja template: "{{7*7}}" became "49" (and any Python expression
    in a station name ran); "{% raw %}" made the run fail."""
    cache = tmp_path / "cache" / small_demo_inputs.name
    shutil.copytree(small_demo_inputs, cache)
    names = {"ST-0001": "Probe {{7*7}}", "ST-0002": "Probe {% raw %} {#", "ST-0003": "{{ self }}"}
    _rename(cache / "stations.csv", names)
    out = tmp_path / "out"
    proc = run_cli("demo", *SMALL_DEMO, "--out", str(out), "--cache-dir", str(tmp_path / "cache"))
    assert proc.returncode == 0, proc.stderr
    for page in _pages(out):
        text = page.read_text(encoding="utf-8")
        assert "Probe 49" not in text and "TemplateReference" not in text, page.name
    st = (out / "map.html").read_text(encoding="utf-8")
    for name in names.values():
        assert json.dumps(name, ensure_ascii=False) in st


def _rename(path: Path, names: dict[str, str]) -> None:
    with open(path, encoding="utf-8", newline="") as f:
        reader = csv.DictReader(f)
        fields, rows = list(reader.fieldnames or []), list(reader)
    for row in rows:
        row["name"] = names.get(row["station_id"], row["name"])
    with open(path, "w", encoding="utf-8", newline="") as f:
        w = csv.DictWriter(f, fieldnames=fields)
        w.writeheader()
        w.writerows(rows)


# ------------------------------------------------------------------------------ browser


@pytest.fixture(scope="module")
def browser():
    require_browser()
    with launch_browser() as b:
        yield b


_INJECTED = """() => ({
    img_x: document.querySelectorAll('img[src="x"]').length,
    handlers: Array.from(document.querySelectorAll('*')).filter(
        e => Array.from(e.attributes).some(a => a.name.startsWith('on'))).length,
    js_links: Array.from(document.querySelectorAll('[href],[src],[action]')).filter(
        e => /^\\s*javascript:/i.test(e.getAttribute('href') || e.getAttribute('src')
                                      || e.getAttribute('action') || '')).length,
    svg_from_data: Array.from(document.querySelectorAll('svg')).filter(
        e => !e.closest('.leaflet-pane, .leaflet-control-container')).length,
    scripts: document.scripts.length,
})"""


def _open(browser, page: Path):
    is_map = "window.altigrade" in page.read_text(encoding="utf-8")
    return open_local_html(
        browser, page, wait_for="window.altigrade && window.altigrade.ready === true" if is_map
        else None,
    )  # fmt: skip


def test_no_dialog_and_no_injected_element_in_any_page(browser, hostile_run) -> None:
    for page in _pages(hostile_run):
        source = page.read_text(encoding="utf-8")
        with _open(browser, page) as (pg, rec):
            pg.wait_for_timeout(150)
            found = pg.evaluate(_INJECTED)
            assert found["img_x"] == 0 and found["handlers"] == 0, (page.name, found)
            assert found["js_links"] == 0 and found["svg_from_data"] == 0, (page.name, found)
            assert found["scripts"] == source.count("<script"), (page.name, found)
        assert rec.dialogs == [], (page.name, rec.dialogs)
        rec.assert_clean()


def _popup_of(pg, station_id: str):
    """Search a station by id and open its popup; None if this page does not list it."""
    pg.fill("#ag-search-input", "")
    pg.fill("#ag-search-input", station_id.lower())
    results = pg.locator("#ag-search-results button")
    hits = [
        i for i in range(results.count())
        if results.nth(i).inner_text().startswith(station_id + " \u00b7")
    ]  # fmt: skip
    if not hits:
        return None
    results.nth(hits[0]).click()
    popup = pg.locator(".leaflet-popup .ag-popup").last
    popup.wait_for(state="visible", timeout=5000)
    return popup


def test_search_opens_popups_showing_the_payload_as_text(browser, hostile_run) -> None:
    pages = [p for p in _pages(hostile_run) if 'id="ag-search"' in p.read_text(encoding="utf-8")]
    assert pages
    shown: dict[str, int] = {sid: 0 for sid in HOSTILE_STATIONS}
    towns_shown = 0
    for page in pages:
        source = page.read_text(encoding="utf-8")
        with _open(browser, page) as (pg, rec):
            for sid, (name, operator) in HOSTILE_STATIONS.items():
                popup = _popup_of(pg, sid)
                if popup is None:
                    continue
                shown[sid] += 1
                title = popup.locator(".ag-popup-title").text_content()
                assert title == name, (page.name, sid, title[:80])
                cells = popup.locator("tr").evaluate_all(
                    "rows => rows.map(r => [r.querySelector('th').textContent,"
                    " r.querySelector('td').textContent])"
                )
                ops = [v for k, v in cells if k == "Operator"]
                assert ops in ([], [operator]), (page.name, sid, ops)
                pg.keyboard.press("Escape")
            for k, town in enumerate(HOSTILE_TOWNS):
                pg.fill("#ag-search-input", f"town{k} ")
                hits = pg.locator("#ag-search-results button")
                if hits.count():
                    assert hits.first.locator(".ag-result-label").text_content() == town
                    towns_shown += 1
            found = pg.evaluate(_INJECTED)
            assert found["img_x"] == 0 and found["handlers"] == 0, (page.name, found)
            assert found["scripts"] == source.count("<script"), (page.name, found)
        rec.assert_clean()
    missing = [sid for sid, n in shown.items() if n == 0]
    assert not missing, f"stations not found by search on any page: {missing}"
    assert towns_shown >= len(HOSTILE_TOWNS), towns_shown


# ------------------------------------------------------------------------ safe handling

PACKAGE = REPO / "pipeline"
FORBIDDEN = {
    "eval(": re.compile(r"(?<![\w.])eval\s*\(|\.eval\s*\("),
    "exec(": re.compile(r"(?<![\w.])exec\s*\("),
    "pickle": re.compile(r"\b(c?pickle|dill|shelve|marshal)\b"),
    "yaml.load without SafeLoader": re.compile(r"yaml\.(unsafe_)?load\s*\((?![^)]*SafeLoader)"),
    "compile(": re.compile(r"(?<![\w.])compile\s*\("),
    "__import__": re.compile(r"__import__\s*\("),
    "os.system / shell=True": re.compile(r"os\.system\s*\(|shell\s*=\s*True"),
    "np.load allow_pickle / read_pickle": re.compile(r"allow_pickle\s*=\s*True|read_pickle"),
}


def _code_lines(path: Path):
    for no, line in enumerate(path.read_text(encoding="utf-8").splitlines(), start=1):
        code = line.split("#", 1)[0]
        yield no, code


def test_package_never_evaluates_or_unpickles_input() -> None:
    hits = []
    files = sorted(PACKAGE.rglob("*.py"))
    assert len(files) > 10
    for path in files:
        for no, code in _code_lines(path):
            for what, rx in FORBIDDEN.items():
                if rx.search(code):
                    hits.append(f"{path.relative_to(REPO)}:{no}: {what}: {code.strip()}")
    assert not hits, "\n".join(hits)


def test_the_source_scan_catches_what_it_looks_for(tmp_path) -> None:
    # The scan is not vacuous: each pattern matches a line that does the forbidden thing.
    samples = {
        "eval(": "x = eval(text)",
        "exec(": "exec(code)",
        "pickle": "import pickle",
        "yaml.load without SafeLoader": "yaml.load(f)",
        "compile(": "compile(src, 'f', 'exec')",
        "__import__": "__import__('os')",
        "os.system / shell=True": "subprocess.run(cmd, shell=True)",
        "np.load allow_pickle / read_pickle": "np.load(p, allow_pickle=True)",
    }
    for what, line in samples.items():
        assert FORBIDDEN[what].search(line), what
    assert not FORBIDDEN["eval("].search("ast.literal_eval(x)")
    assert not FORBIDDEN["yaml.load without SafeLoader"].search("yaml.load(f, Loader=SafeLoader)")


def test_configs_are_parsed_with_tomllib_only() -> None:
    src = (PACKAGE / "config.py").read_text(encoding="utf-8")
    assert "import tomllib" in src
    for path in sorted(PACKAGE.rglob("*.py")):
        text = path.read_text(encoding="utf-8")
        assert not re.search(r"^\s*(import|from)\s+(toml|tomli|yaml|json5|configparser)\b", text,
                             re.M), path  # fmt: skip


def test_config_string_holding_code_stays_a_string(tmp_path) -> None:
    marker = tmp_path / "PWNED"
    code = f"__import__('pathlib').Path({str(marker)!r}).touch()"
    p = tmp_path / "run.toml"
    p.write_text(
        f'name = "{code[:70]}"\n[inputs]\nstations = "s.csv"\ndem = "d.tif"\n'
        f'stations_crs = "{code.replace(chr(34), chr(39))}"\n',
        encoding="utf-8",
    )
    cfg = load_config(p)
    assert cfg.name == code[:70]
    assert not marker.exists()


def test_config_error_escapes_control_characters_in_keys(tmp_path) -> None:
    p = tmp_path / "run.toml"
    p.write_text(
        '[inputs]\nstations = "s.csv"\ndem = "d.tif"\n"evil\\nkey\\u001b[2J" = 1\n',
        encoding="utf-8",
    )
    with pytest.raises(ConfigError) as err:
        load_config(p)
    msg = str(err.value)
    assert "\n" not in msg and "\x1b" not in msg, repr(msg)


@pytest.mark.parametrize(
    ("cell", "written"),
    [
        (
            '=HYPERLINK("http://example.invalid","x")',
            '"\'=HYPERLINK(""http://example.invalid"",""x"")"',
        ),
        ("+1+2", "'+1+2"),
        ("@SUM(A1)", "'@SUM(A1)"),
        ("-2+3", "'-2+3"),
        ("\tTab", "'\tTab"),
        ("-135.5", "-135.5"),  # a number written as text stays a number
        ("Plain name", "Plain name"),
    ],
)
def test_csv_text_neutralises_formula_cells(cell, written) -> None:
    """pipeline.io.csv_text (OWASP 'CSV injection' rule, from memory)."""
    text = pio.csv_text(pd.DataFrame({"name": [cell], "lon": [-135.5]}))
    assert text.splitlines()[1] == f"{written},-135.5"


def test_csv_output_neutralises_spreadsheet_formulas(small_demo_inputs, tmp_path) -> None:
    """A name like =HYPERLINK(...) would run as a formula when a regulator opens the CSV in a
    spreadsheet (OWASP 'CSV injection'); text cells starting with = + - @ get a leading '."""
    cache = tmp_path / "cache" / small_demo_inputs.name
    shutil.copytree(small_demo_inputs, cache)
    path = cache / "stations.csv"
    with open(path, encoding="utf-8", newline="") as f:
        reader = csv.DictReader(f)
        fields, rows = reader.fieldnames, list(reader)
    rows[0]["name"] = '=HYPERLINK("http://example.invalid","x")'
    with open(path, "w", encoding="utf-8", newline="") as f:
        w = csv.DictWriter(f, fieldnames=fields)
        w.writeheader()
        w.writerows(rows)
    out = tmp_path / "out"
    proc = run_cli("demo", *SMALL_DEMO, "--out", str(out), "--cache-dir", str(tmp_path / "cache"))
    assert proc.returncode == 0, proc.stderr
    with open(out / "stations.csv", encoding="utf-8", newline="") as f:
        names = [r["name"] for r in csv.DictReader(f)]
    assert not any(n.startswith(("=", "+", "@")) for n in names)
    assert '\'=HYPERLINK("http://example.invalid","x")' in names
