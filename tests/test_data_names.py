"""Names from the data are safe everywhere they appear: the one rule at the trainer's boundary
(:mod:`service.text_safety`) and its renderers on the terminal, in CSV, in plots and on pages.

Stores written before the rule (simulated by training with the rule switched off) keep
loading and serving; their names are shown safely all the same.
"""

from __future__ import annotations

import csv
import io
import json
import re

import html5lib
import numpy as np
import pytest
from cli_helpers import run_cli

from service import text_safety
from service.app import create_app
from service.settings import Settings
from service.text_safety import csv_cell, name_refusal, plot_label, visible

ESC_NAME = "y\x1b[31mred"
RLO_NAME = "score\u202eflipped"
FORMULA = "=cmd|' /C calc'!A0"
FAST = ("--kernel", "rbf", "--gamma", "0.5", "--ridge", "0.1")


def write_csv(path, names: list[str], rows: int = 40, seed: int = 0):
    """``rows`` rows of len(names) columns: the last is a smooth function of the others, and
    the inputs include negative numbers."""
    rng = np.random.default_rng(seed)
    x = rng.normal(size=(rows, len(names) - 1))
    y = np.sin(x).sum(axis=1) + 0.05 * rng.normal(size=rows)
    with open(path, "w", newline="", encoding="utf-8") as fh:
        w = csv.writer(fh)
        w.writerow(names)
        w.writerows(np.column_stack([x, y]).tolist())
    return path


def train_as_older_code(monkeypatch, capsys, *argv) -> None:
    """Train with the name rule switched off: what kridge wrote before the rule existed."""
    with monkeypatch.context() as m:
        m.setattr(text_safety, "is_refused", lambda ch: False)
        code, _, err = run_cli(capsys, "train", *argv, "--no-report", "--quiet", *FAST)
    assert code == 0, err


# -- the rule ------------------------------------------------------------------------------

REFUSED = {
    "ESC (Cc)": "a\x1bb", "BEL (Cc)": "a\x07", "newline (Cc)": "a\nb", "C1 CSI (Cc)": "a\x9bb",
    "RLO": "a\u202eb", "LRE": "a\u202ab", "PDF": "a\u202cb", "LRI": "a\u2066b",
    "PDI": "a\u2069b", "LRM": "a\u200eb", "RLM": "a\u200fb", "ALM": "a\u061cb",
    "zero-width space": "a\u200bb", "zero-width joiner": "a\u200db", "BOM inside": "a\ufeffb",
    "line separator (Zl)": "a\u2028b", "paragraph separator (Zp)": "a\u2029b",
}
ALLOWED = ["cost_$_per_$", FORMULA, "@SUM(1+1)", "-offset", "+gain", '"quoted" \'name\'',
           "<b>bold</b>&amp;", "température °C", "温度", "טמפרטורה", "درجة", "🌡 temp",
           "a\\$b$", "tab\\tlike"]


@pytest.mark.parametrize("name", REFUSED.values(), ids=REFUSED.keys())
def test_rule_refuses_controls_bidi_and_invisible_format_characters(name):
    message = name_refusal(["ok", name], ["ok", "x", name])
    assert message is not None and message.startswith(f'column 3 "{visible(name)}"')
    assert "U+" in message
    assert all(not text_safety.is_refused(ch) for ch in message)  # the message prints safely


@pytest.mark.parametrize("name", ALLOWED)
def test_rule_allows_printable_unicode_dollars_formulas_quotes_and_markup(name):
    assert name_refusal([name], [name]) is None
    assert visible(name) == name


def test_visible_escapes_exactly_the_refused_characters():
    assert visible(ESC_NAME) == "y\\x1b[31mred"
    assert visible(RLO_NAME) == "score\\u202eflipped"
    assert visible("a\U000e0001b") == "a\\U000e0001b"  # a tag character (Cf) above the BMP
    assert visible("é\u00a0x") == "é\u00a0x"  # a no-break space is printable: kept


def test_csv_cell_follows_owasp():
    # OWASP, "CSV Injection" (owasp.org/www-community/attacks/CSV_Injection): cells starting
    # with = + - @ tab or carriage return get a leading single quote
    for lead in ("=", "+", "-", "@"):
        assert csv_cell(lead + "1+1") == "'" + lead + "1+1"
    assert csv_cell("\tx") == "'\\x09x" and csv_cell("\rx") == "'\\x0dx"  # escaped, quoted
    assert csv_cell("x=1") == "x=1" and csv_cell("'=1") == "'=1" and csv_cell("") == ""


@pytest.mark.parametrize("name", ["cost_$_per_$", "$x$", "a\\$b$", "$$", "$5 and $10",
                                  "50 $", "\\$x$y"])
def test_plot_label_renders_the_name_literally(name):
    # matplotlib's documented Text(parse_math=False) shows the raw text; the escaped label
    # must render to the same extent through the default (mathtext-parsing) path
    import matplotlib

    matplotlib.use("Agg", force=True)
    import matplotlib.pyplot as plt

    fig = plt.figure()
    try:
        renderer = fig.canvas.get_renderer()
        literal = fig.text(0.1, 0.5, name, parse_math=False).get_window_extent(renderer)
        label = fig.text(0.1, 0.5, plot_label(name)).get_window_extent(renderer)
    finally:
        plt.close(fig)
    assert (label.width, label.height) == (literal.width, literal.height)


# -- reproduction 1: a `$` in a target name ------------------------------------------------

def test_dollar_target_trains_and_the_report_shows_it_literally(tmp_path, store_dir, capsys):
    data = write_csv(tmp_path / "cost.csv", ["load_kw", "hours", "cost_$_per_$"])
    # tuned (no --ridge): the report then plots the search curve with the target in a label
    code, out, err = run_cli(capsys, "train", data, "--target", "cost_$_per_$", "--name",
                             "cost", "--quiet")
    assert code == 0, err
    assert "cost_$_per_$" in out
    report = (store_dir / "cost" / "versions" / "1" / "report.html").read_text()
    assert "<bdi>cost_$_per_$</bdi>" in report
    assert len(re.findall(r'src="data:image/png;base64,', report)) >= 3


# -- reproduction 2: formula-leading names in `kridge predict` CSV ---------------------------

def test_predict_csv_neutralises_formula_names_and_keeps_numbers(tmp_path, store_dir, capsys):
    names = [FORMULA, "@SUM(1+1)", "-offset", "a;=b", "+target"]
    data = write_csv(tmp_path / "f.csv", names)
    code, _, err = run_cli(capsys, "train", data, "--target", "+target", "--name", "f",
                           "--release", "--no-report", "--quiet", *FAST)
    assert code == 0, err
    score = tmp_path / "score.csv"
    lines = data.read_text().splitlines()
    score.write_text("\n".join(lines[:6] + ["99,0,0,0,1"]) + "\n")  # last row: out of range
    out = tmp_path / "out.csv"
    code, _, err = run_cli(capsys, "predict", "f", score, "--out", out, "--with-inputs")
    assert code == 0, err
    with open(out, newline="") as fh:
        header, *rows = list(csv.reader(fh))
    # OWASP, "CSV Injection": a cell starting with = + - @ is prefixed with a single quote
    assert header == ["'" + FORMULA, "'@SUM(1+1)", "'-offset", "a;=b", "'+target_predicted",
                      "inside", "novelty", "out_of_range", "t2", "q", "target_out_of_range",
                      "flagged_by"]
    assert rows[-1][7] == "'" + FORMULA and rows[-1][5] == "false"
    assert rows[-1][10] in ("", "'+target")  # a target's name is neutralised too
    # numbers stay plain numbers (negative ones too): the exact inputs, unquoted
    inputs = np.array([[float(c) for c in line.split(",")[:4]] for line in lines[1:6]])
    assert np.array_equal(np.array([[float(c) for c in r[:4]] for r in rows[:5]]), inputs)
    assert (inputs < 0).any() and not any(c.startswith("'") for r in rows for c in r[:5])
    # every text cell is quoted, every number is not: a ';' in a name cannot split a cell
    with open(out, newline="") as fh:
        typed = list(csv.reader(fh, quoting=csv.QUOTE_NONNUMERIC))
    assert all(isinstance(c, str) for c in typed[0])
    assert all(isinstance(c, float) for r in typed[1:] for c in r[:5] + [r[6]])
    assert all(isinstance(r[5], str) and isinstance(r[7], str) for r in typed[1:])


# -- reproduction 3: a right-to-left override in a target name on the pages ------------------

def bdi_texts(page: str) -> list[str]:
    """Text of every <bdi> element of a page (html5lib, as a browser parses it)."""
    doc = html5lib.parse(page, namespaceHTMLElements=False)
    return ["".join(e.itertext()) for e in doc.iter("bdi")]


def test_rtl_override_in_an_old_stores_target_is_isolated_on_every_page(
        tmp_path, store_dir, monkeypatch, capsys):
    data = write_csv(tmp_path / "r.csv", ["temp\u202ec", "flow", RLO_NAME])
    train_as_older_code(monkeypatch, capsys, data, "--target", RLO_NAME, "--name", "r",
                        "--release")
    client = create_app(Settings(store=str(store_dir)), watch=False).test_client()
    overview = client.get("/").get_data(as_text=True)
    assert f"<bdi>{RLO_NAME}</bdi>: RMSE" in overview  # the figures sit outside the isolate
    assert bdi_texts(overview) == [RLO_NAME]
    model = client.get("/page/r").get_data(as_text=True)
    assert f"<bdi>{RLO_NAME}</bdi> (holdout)" in model
    tried = client.get("/page/r/try?f0=50&f1=0").get_data(as_text=True)
    texts = bdi_texts(tried)
    assert texts.count("temp\u202ec") == 2  # its field label and the out-of-range verdict
    assert RLO_NAME in texts and "flow" in texts
    assert re.search("Out of range: <bdi>temp\u202ec</bdi> = 50 is above", tried)
    # and the old model still serves, by name
    answer = client.post("/models/r/predict", json={"rows": [{"temp\u202ec": 0, "flow": 0}]})
    assert answer.status_code == 200 and np.isfinite(answer.get_json()["results"][0]["value"])


def test_markup_in_names_stays_escaped_on_pages(tmp_path, store_dir, capsys):
    data = write_csv(tmp_path / "m.csv", ["<i>x</i>", "b&c", "<script>t</script>"])
    code, _, err = run_cli(capsys, "train", data, "--target", "<script>t</script>", "--name",
                           "m", "--release", "--no-report", "--quiet", *FAST)
    assert code == 0, err
    client = create_app(Settings(store=str(store_dir)), watch=False).test_client()
    for path in ("/", "/page/m", "/page/m/try?f0=9&f1=0"):
        page = client.get(path).get_data(as_text=True)
        assert "<script>" not in page and "<i>x</i>" not in page
    assert "<bdi>&lt;script&gt;t&lt;/script&gt;</bdi>" in page
    assert "<bdi>&lt;i&gt;x&lt;/i&gt;</bdi>" in page and "<bdi>b&amp;c</bdi>" in page


# -- reproduction 4: ANSI escapes ----------------------------------------------------------

@pytest.mark.parametrize("where", ["target", "feature", "default feature", "time"])
def test_escape_in_a_used_name_is_refused_at_train(tmp_path, store_dir, capsys, where):
    names = {"target": ["a", "b", ESC_NAME], "feature": [ESC_NAME, "b", "y"],
             "default feature": [ESC_NAME, "b", "y"], "time": ["a", ESC_NAME, "y"]}[where]
    data = write_csv(tmp_path / "e.csv", names)
    target = ESC_NAME if where == "target" else "y"
    extra = {"feature": ["--features", f"{ESC_NAME},b"], "time": ["--time", ESC_NAME,
                                                                 "--features", "a"]}
    code, out, err = run_cli(capsys, "train", data, "--target", target, "--name", "e",
                             *extra.get(where, []), *FAST)
    assert code == 2, err
    position = names.index(ESC_NAME) + 1
    assert err.count("\n") == 1 and "\x1b" not in err and out == ""
    assert f'column {position} "y\\x1b[31mred"' in err and "U+001B" in err
    assert not (store_dir / "e").exists()  # nothing written in the store


def test_an_unused_odd_column_does_not_stop_training(tmp_path, store_dir, capsys):
    data = write_csv(tmp_path / "u.csv", ["a", "b", f"note{ESC_NAME}", "y"])
    code, _, err = run_cli(capsys, "train", data, "--target", "y", "--features", "a,b",
                           "--name", "u", "--no-report", "--quiet", *FAST)
    assert code == 0, err
    # …and an error listing the header shows it escaped
    code, _, err = run_cli(capsys, "train", data, "--target", "nosuch", "--name", "u")
    assert code == 2 and "\x1b" not in err and "notey\\x1b[31mred" in err


def test_old_store_names_print_escaped_and_the_model_serves(tmp_path, store_dir, monkeypatch,
                                                             capsys):
    data = write_csv(tmp_path / "o.csv", [f"in{ESC_NAME}", "b\u202e", ESC_NAME])
    train_as_older_code(monkeypatch, capsys, data, "--target", ESC_NAME, "--name", "old",
                        "--release")
    printed = []
    for argv in (("inspect", "old"), ("versions", "old"), ("verify", "old"),
                 ("predict", "old", data, "--with-inputs")):
        code, out, err = run_cli(capsys, *argv)
        assert code == 0, err
        printed.append(out + err)
    text = "".join(printed)
    assert not any(text_safety.is_refused(ch) for ch in text.replace("\n", ""))
    inspect = printed[0]
    assert re.search(r"targets +y\\x1b\[31mred\n", inspect)
    assert re.search(r"features +2: iny\\x1b\[31mred, b\\u202e \(sha256 [0-9a-f]{12}\)\n",
                     inspect)
    header = next(csv.reader(io.StringIO(printed[3])))
    assert header[:3] == ["iny\\x1b[31mred", "b\\u202e", "y\\x1b[31mred_predicted"]
    # the manifest itself is unchanged: --json gives the names as stored
    code, out, _ = run_cli(capsys, "inspect", "old", "--json")
    assert json.loads(out)["targets"] == [ESC_NAME]

