"""The HTML report: self-contained, every analysis and figure present, text escaped, JSON exact."""

import json
import re

import numpy as np
import pytest
import torch
from numpy.testing import assert_allclose

import hiddenlens
from hiddenlens import compare_runs, write_report
from hiddenlens._faces.report import GENERAL_CAUTIONS, report_data
from hiddenlens._faces.summary import (
    AnalysisResults,
    array_summaries,
    available_analyses,
    key_figures,
    run_analyses,
)
from tests.conftest import gaussian_inputs, gaussian_module, heavy_modules_after

IMG = '<img src="data:image/png;base64,'
# figures per result in a one-model report (a comparison shows one per run plus an overlay)
SINGLE_FIGURES = {"spectra": 1, "gradient_flow": 1, "lyapunov": 2, "pca": 2, "fixed_points": 1,
                  "memory": 1}
OPTIONS = {"memory": {"max_lag": 5, "n_steps": 300}, "fixed_points": {"n_starts": 8}}


def _module(cls, hidden, seed):
    return gaussian_module(cls, 3, hidden, seed=seed)


@pytest.fixture(scope="module")
def inputs():
    return gaussian_inputs((2, 30, 3), seed=0)


@pytest.fixture(scope="module")
def results(inputs):
    return run_analyses(_module(torch.nn.GRU, 6, 0), inputs, options=OPTIONS)


@pytest.fixture(scope="module")
def single(results, tmp_path_factory):
    path = tmp_path_factory.mktemp("single") / "sub" / "report.html"
    out = write_report(results, path, name="my <gru> & co", title="T <script>alert(1)</script>")
    return out, out.read_text(encoding="utf-8"), json.loads(path.with_suffix(".json").read_text())


def _sections(page):
    return dict(re.findall(r'<section id="analysis-(\w+)">(.*?)</section>', page, flags=re.S))


def test_report_is_self_contained(single):
    path, page, _ = single
    assert path.name == "report.html" and path.with_suffix(".json").is_file()
    assert page.startswith("<!DOCTYPE html>") and page.rstrip().endswith("</html>")
    assert "http://" not in page and "https://" not in page
    assert "<script" not in page and "<link" not in page and "@import" not in page
    assert not list(path.parent.glob(".*partial"))


def test_report_has_every_analysis_and_figure(single, results):
    _, page, _ = single
    sections = _sections(page)
    # task memory needs targets in context=: without them it is skipped, with the reason
    assert set(results) == set(available_analyses()) - {"task_memory"}
    assert "targets" in results.skipped["task_memory"]
    for a in results:
        assert sections[a].count(IMG) == SINGLE_FIGURES[a], a
    assert page.count(IMG) == sum(SINGLE_FIGURES[a] for a in results)
    for b64 in re.findall(r'base64,([A-Za-z0-9+/=]+)"', page):
        import base64

        assert base64.b64decode(b64)[:8] == b"\x89PNG\r\n\x1a\n"


def test_report_escapes_text(single):
    _, page, doc = single
    assert "<script>alert(1)</script>" not in page
    assert "T &lt;script&gt;alert(1)&lt;/script&gt;" in page
    assert "my &lt;gru&gt; &amp; co" in page
    assert doc["title"] == "T <script>alert(1)</script>"
    assert list(doc["runs"]) == ["my <gru> & co"]


def test_report_states_cautions_and_inputs(single):
    _, page, doc = single
    for phrase in ("input statistics", "lower bound", "constant input", "heuristic",
                   "one basis"):
        assert phrase in page, phrase
    for c in GENERAL_CAUTIONS[:-1]:
        assert c.replace("'", "&#x27;") in page
    assert "2 sequences of 30 steps with 3 input features" in page
    sections = _sections(page)
    if "memory" in sections:
        assert "Measured in probe mode" in sections["memory"]
    if "fixed_points" in sections:
        assert "Constant input held at zero on every feature; 8 starting states" in \
            sections["fixed_points"]
    if "lyapunov" in sections:
        assert "7 warm-up steps" in sections["lyapunov"]  # min(100, T // 4), T = 30
    assert doc["inputs"]["shape"] == [2, 30, 3]
    assert doc["inputs"]["description"].startswith("2 sequences of 30 steps")


def _json_float(v):
    return {"nan": float("nan"), "inf": float("inf"), "-inf": float("-inf")}.get(v, v)


def test_report_json_equals_the_results(single, results):
    _, _, doc = single
    assert doc["format"] == "hiddenlens-report" and doc["hiddenlens_version"] == \
        hiddenlens.__version__
    run = doc["runs"]["my <gru> & co"]
    figs = key_figures(results)
    assert list(run["key_figures"]) == list(figs)
    for k, v in figs.items():
        got = _json_float(run["key_figures"][k])
        if isinstance(v, str):
            assert got == v
        else:
            assert_allclose(got, v, rtol=0, atol=0, equal_nan=True)
    assert run["arrays"] == json.loads(json.dumps(array_summaries(results)))
    # against the library's own result objects, not the summaries
    if "pca" in results:
        assert run["arrays"]["pca"]["explained_variance_ratio"] == \
            results["pca"].explained_variance_ratio.tolist()
    if "lyapunov" in results:
        assert run["arrays"]["lyapunov"]["exponents"] == results["lyapunov"].exponents.tolist()
    assert run["model"]["kind"] == "gru" and run["model"]["state_size"] == 6
    assert run["options"]["memory"]["max_lag"] == 5
    assert run["summary"]


def test_comparison_report(inputs, tmp_path):
    runs = {"rnn": _module(torch.nn.RNN, 5, 1), "lstm": _module(torch.nn.LSTM, 4, 2)}
    comp = compare_runs(runs, inputs, which=["pca"])
    path = write_report(comp, tmp_path / "cmp.html", json_path=tmp_path / "figs.json")
    page = path.read_text(encoding="utf-8")
    doc = json.loads((tmp_path / "figs.json").read_text())
    assert 'id="similarity"' in page and "Kornblith" in page
    assert _sections(page)["pca"].count(IMG) == 1 + 2  # overlay + one per run
    assert page.count(IMG) == 1 + 3  # CKA matrix + PCA
    assert "\u0394 lstm" in page and "given inputs only" in page
    assert doc["comparison"]["names"] == ["rnn", "lstm"]
    assert_allclose(doc["comparison"]["cka"], comp.cka)
    assert set(doc["runs"]) == {"rnn", "lstm"}
    assert doc["runs"]["lstm"]["key_figures"] == key_figures(comp.results["lstm"])


def test_skipped_analyses_are_noted(inputs, tmp_path):
    res = run_analyses(_module(torch.nn.RNN, 5, 1), inputs, which=["pca"])
    res.skipped["memory"] = "not available in this installation"
    page = write_report(res, tmp_path / "r.html", json_path=False).read_text()
    assert "Skipped \u2014 not available in this installation" in _sections(page)["memory"]
    assert not (tmp_path / "r.json").exists()


def test_report_data_writes_non_finite_numbers_as_strings(inputs):
    res = AnalysisResults()
    res["memory"] = type("M", (), {"lags": np.arange(3), "scores": np.array([1.0, np.nan, 0]),
                                   "span": 0, "capacity": float("inf")})()
    doc = report_data(res)
    run = doc["runs"]["model"]
    assert run["key_figures"]["memory_capacity"] == "inf"
    assert run["arrays"]["memory"]["scores"] == [1.0, "nan", 0.0]
    json.dumps(doc, allow_nan=False)


def test_report_modules_import_without_matplotlib():
    loaded = heavy_modules_after(
        "hiddenlens._faces.report, hiddenlens._analyses.compare, hiddenlens._faces.cli",
        ("matplotlib", "ipywidgets", "pandas"))
    assert loaded == "[]"


def test_write_report_refuses_other_objects(tmp_path):
    with pytest.raises(TypeError, match="write_report takes"):
        write_report([1, 2], tmp_path / "x.html")


def test_report_on_one_step_inputs_does_not_crash(tmp_path):
    x = np.random.default_rng(1).standard_normal((2, 1, 3)).astype(np.float32)
    res = run_analyses(_module(torch.nn.GRU, 4, 0), x, options=OPTIONS)
    path = write_report(res, tmp_path / "t1.html")
    doc = json.loads(path.with_suffix(".json").read_text())
    # one step: gradient flow has the single lag back to the initial state
    assert next(iter(doc["runs"].values()))["arrays"]["gradient_flow"]["lags"] == [1.0]


def test_report_draws_run_names_as_plain_text(inputs, tmp_path):
    runs = {r"$\foo$": _module(torch.nn.RNN, 5, 1), "b_$x^{2$": _module(torch.nn.RNN, 5, 2)}
    comp = compare_runs(runs, inputs, which=["pca"])
    page = write_report(comp, tmp_path / "m.html").read_text(encoding="utf-8")
    assert page.count(IMG) == 4 and r"$\foo$" in page


def test_report_note_given_as_one_string_stays_one_paragraph(results, tmp_path):
    page = write_report(results, tmp_path / "n.html", notes="hello",
                        json_path=False).read_text(encoding="utf-8")
    assert "hello" in page and ">h<" not in page


def test_report_temporary_file_never_follows_a_planted_symlink(results, tmp_path):
    import os

    victim = tmp_path / "victim.txt"
    victim.write_text("keep me")
    os.symlink(victim, tmp_path / ".r.html.partial")  # the name an older version used
    write_report(results, tmp_path / "r.html", json_path=False)
    assert victim.read_text() == "keep me" and (tmp_path / "r.html").stat().st_size > 1000


# ---------------------------------------------------------------------- diagnosis, contents, alt
class _Page(__import__("html.parser").parser.HTMLParser):
    """Ids, links, images and the order of sections, read with the standard library's parser
    (html.parser) rather than with the report's own code."""

    def __init__(self):
        super().__init__()
        self.ids, self.hrefs, self.imgs, self.sections = [], [], [], []

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        if "id" in a:
            self.ids.append(a["id"])
        if tag == "section":
            self.sections.append(a.get("id"))
        if tag == "a" and a.get("href", "").startswith("#"):
            self.hrefs.append(a["href"][1:])
        if tag == "img":
            self.imgs.append(a)


TASK = {"rnn": {"accuracy": 0.99, "chance": 1 / 3, "n_eval": 500, "horizon": 10},
        "lstm": {"accuracy": 0.40, "chance": 1 / 3, "n_eval": 500}}


@pytest.fixture(scope="module")
def diagnosed(inputs, tmp_path_factory):
    runs = {"rnn": _module(torch.nn.RNN, 5, 1), "lstm": _module(torch.nn.LSTM, 4, 2)}
    comp = compare_runs(runs, inputs, which=["pca", "gradient_flow"])
    path = write_report(comp, tmp_path_factory.mktemp("diag") / "d.html", task=TASK)
    page = path.read_text(encoding="utf-8")
    parsed = _Page()
    parsed.feed(page)
    return page, parsed, json.loads(path.with_suffix(".json").read_text())


def test_diagnosis_comes_first_with_one_line_per_run(diagnosed):
    page, parsed, doc = diagnosed
    assert parsed.sections[0] == "diagnosis"
    section = re.search(r'<section id="diagnosis">(.*?)</section>', page, flags=re.S).group(1)
    lines = re.findall(r'<li id="run-\d+" class="diagnosis">(.*?)</li>', section, flags=re.S)
    assert len(lines) == 2
    # the accuracies given are quoted; 0.40 against chance 1/3 is far from solved
    assert "99.0%" in lines[0] and "40.0%" in lines[1]
    assert "failing" in lines[1]
    assert doc["runs"]["lstm"]["diagnosis"]["level"] == "failing"
    assert doc["runs"]["rnn"]["diagnosis"]["task"]["accuracy"] == 0.99


def test_contents_links_reach_every_anchor(diagnosed):
    _, parsed, _ = diagnosed
    assert {"diagnosis", "summary", "key-figures", "analysis-pca", "run-1", "run-2"} \
        <= set(parsed.hrefs)
    assert set(parsed.hrefs) <= set(parsed.ids)
    assert len(parsed.ids) == len(set(parsed.ids))  # ids are unique (HTML standard)


def test_every_image_has_alt_text(diagnosed, single):
    _, parsed, _ = diagnosed
    one = _Page()
    one.feed(single[1])
    for p in (parsed, one):
        assert p.imgs
        assert all(len(img.get("alt", "").strip()) > 10 for img in p.imgs)
    # per-run figures carry their key figures in words
    alts = [img["alt"] for img in parsed.imgs]
    assert any(a.startswith("Figure: rnn") and "participation ratio" in a for a in alts)


def test_report_without_task_still_diagnoses_and_rejects_bad_task(results, tmp_path):
    page = write_report(results, tmp_path / "n.html", json_path=False).read_text()
    assert page.index('id="diagnosis"') < page.index('id="summary"')
    assert "No task metrics were given" in page
    # one metrics mapping is taken for the single run
    page = write_report(results, tmp_path / "o.html", json_path=False,
                        task={"accuracy": 0.95, "chance": 0.5}).read_text()
    assert "95.0%" in page
    with pytest.raises(ValueError, match="not in the report"):
        write_report(results, tmp_path / "x.html", task={"other": {"accuracy": 0.5}})
    with pytest.raises(TypeError, match="task must be a mapping"):
        write_report(results, tmp_path / "x.html", task=[0.5])


def test_key_figure_table_gives_intervals_and_says_what_is_noise(tmp_path):
    x = np.random.default_rng(3).standard_normal((12, 30, 3)).astype(np.float32)
    runs = {"a": _module(torch.nn.RNN, 5, 1), "a again": _module(torch.nn.RNN, 5, 1),
            "b": _module(torch.nn.LSTM, 4, 2)}
    comp = compare_runs(runs, x, which=["lyapunov", "pca"])
    path = write_report(comp, tmp_path / "cmp.html")
    page = path.read_text(encoding="utf-8")
    table = page[page.index('id="key-figures"'):]
    table = table[:table.index("</section>")]
    t = comp.table
    from hiddenlens._analyses.figures import format_figure

    for n in runs:
        lo, hi = t.loc[n, "lyapunov_max low"], t.loc[n, "lyapunov_max high"]
        assert (f"[{format_figure('lyapunov_max', lo)}, "
                f"{format_figure('lyapunov_max', hi)}]") in table
    # the same weights: every difference is zero and within noise, said in words
    assert t.loc["a again", "\u0394 participation_ratio within noise"] is True
    assert "(within noise)" in table and "90% bootstrap intervals" in table
    doc = json.loads(path.with_suffix(".json").read_text())
    assert doc["comparison"]["within_noise"]["a again"]["lyapunov_max"] is True
    assert doc["comparison"]["within_noise"]["b"]["lyapunov_max"] == comp.noise(
        "lyapunov_max", "b")
    assert_allclose(doc["runs"]["b"]["intervals"]["figures"]["lyapunov_max"],
                    [t.loc["b", "lyapunov_max low"], t.loc["b", "lyapunov_max high"]])


def test_over_training_section_from_a_monitor(results, inputs, tmp_path):
    import pandas as pd

    from hiddenlens import Monitor
    from hiddenlens._faces.timeline_report import timeline_section
    from hiddenlens._training.timeline import as_timeline

    mon = Monitor(inputs, figures=["lyapunov_max"])
    mon._rows = [{"step": s, "figure": "lyapunov_max", "value": -0.1 * s, "low": -0.1 * s - 0.05,
                  "high": -0.1 * s + 0.05} for s in (0, 50, 100)]
    path = write_report(results, tmp_path / "r.html", timeline=mon)
    page = path.read_text(encoding="utf-8")
    assert 'href="#over-training"' in page and timeline_section(as_timeline(mon), heading=3) \
        in page
    doc = json.loads(path.with_suffix(".json").read_text())
    assert pd.DataFrame(doc["runs"]["model"]["timeline"]["rows"]).value.tolist() == \
        [0.0, -5.0, -10.0]
    with pytest.raises(ValueError, match="not in the report"):
        write_report(results, tmp_path / "r2.html", timeline={"other": mon})


def test_runs_compared_in_one_row_share_their_y_range():
    from matplotlib.figure import Figure

    from hiddenlens._faces.report import _share_y

    figs = []
    for top in (1.0, 5.0):
        fig = Figure()
        ax = fig.add_subplot()
        ax.plot([0, 1], [0.0, top])
        ax.set_ylabel("same quantity")
        figs.append([("", fig)])
    _share_y(figs)
    # matplotlib's own limits (autoscaled with its margins) give the union of both rows
    (a,), (b,) = ([f.axes[0] for _, f in row] for row in figs)
    assert a.get_ylim() == b.get_ylim() and a.get_ylim()[1] >= 5.0
