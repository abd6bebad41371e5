"""What a reader sees on the run, stress and sweep pages, checked by parsing the HTML.

Each test names the reader's complaint it guards against (issue 8, "The
reports"; issue 7, wording).  Pages are parsed with :mod:`html.parser`; chart
layouts are checked on the matplotlib figures before they become PNG.
"""

from __future__ import annotations

import dataclasses
import re
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest
from matplotlib.figure import Figure
from matplotlib.text import Annotation

import debtsim
from debtsim.options import RunOptions
from debtsim.report import charts
from debtsim.report.html import render_html
from debtsim.report.page import STYLE
from debtsim.report.study_charts import line_figure, movers_figure, sweep_charts
from debtsim.report.study_pages import render_stress_page, render_sweep_page
from debtsim.report.text import CAUTION, WITHOUT_LINKS
from debtsim.studies.sweep import parse_grid, run_sweep

ROOT = Path(__file__).resolve().parents[2]
HARBOUR = ROOT / "scenarios" / "harbour_small.yaml"
HARBOUR_STRESS = ROOT / "scenarios" / "harbour_small_stress.yaml"
NODE_WARNING = "The circuit's 32 factor nodes reproduce an obligor's PD only to within 9.9%"


# ---------------------------------------------------------------- parsing
@dataclasses.dataclass
class Node:
    """One element: tag, attributes, children and the text directly inside it."""

    tag: str
    attrs: dict[str, str]
    children: list[Node] = dataclasses.field(default_factory=list)
    parts: list[str | Node] = dataclasses.field(default_factory=list)

    @property
    def classes(self) -> set[str]:
        return set(self.attrs.get("class", "").split())

    def text(self) -> str:
        """All text inside, whitespace collapsed."""
        out = "".join(p if isinstance(p, str) else p.text() for p in self.parts)
        return re.sub(r"\s+", " ", out).strip()

    def walk(self) -> list[Node]:
        """This element and every element inside it, in document order."""
        found = [self]
        for child in self.children:
            found += child.walk()
        return found

    def find_all(self, tag: str | None = None, cls: str | None = None) -> list[Node]:
        return [n for n in self.walk()[1:]
                if (tag is None or n.tag == tag) and (cls is None or cls in n.classes)]

    def find(self, tag: str | None = None, cls: str | None = None) -> Node:
        found = self.find_all(tag, cls)
        assert found, f"no <{tag}> with class {cls!r}"
        return found[0]


class _TreeBuilder(HTMLParser):
    VOID = {"meta", "img", "br", "hr", "link", "input"}

    def __init__(self) -> None:
        super().__init__(convert_charrefs=True)
        self.root = Node("document", {})
        self.stack = [self.root]

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        node = Node(tag, {k: v or "" for k, v in attrs})
        self.stack[-1].children.append(node)
        self.stack[-1].parts.append(node)
        if tag not in self.VOID:
            self.stack.append(node)

    def handle_endtag(self, tag: str) -> None:
        if tag in self.VOID:
            return
        for i in range(len(self.stack) - 1, 0, -1):
            if self.stack[i].tag == tag:
                del self.stack[i:]
                return
        raise AssertionError(f"</{tag}> closes nothing")

    def handle_data(self, data: str) -> None:
        self.stack[-1].parts.append(data)


def parse(page: str) -> Node:
    """Parse a page into a tree; every element must be closed."""
    builder = _TreeBuilder()
    builder.feed(page)
    builder.close()
    assert builder.stack == [builder.root], "unclosed elements"
    return builder.root


def _main_children(doc: Node) -> list[Node]:
    return doc.find("main").children


def _position(doc: Node, node: Node) -> int:
    return doc.walk().index(node)


def _first_h2(doc: Node) -> Node:
    return doc.find("h2")


# ---------------------------------------------------------------- pages
@pytest.fixture(scope="module")
def book() -> debtsim.Book:
    return debtsim.load_book(HARBOUR)


@pytest.fixture(scope="module")
def run_result(book: debtsim.Book) -> debtsim.RunResult:
    return debtsim.run(book)


@pytest.fixture(scope="module")
def run_page(run_result: debtsim.RunResult) -> Node:
    return parse(render_html(run_result))


@pytest.fixture(scope="module")
def stress_result(book: debtsim.Book) -> debtsim.StressResult:
    return debtsim.stress(book, debtsim.load_scenarios(HARBOUR_STRESS, book=book))


@pytest.fixture(scope="module")
def stress_page(stress_result: debtsim.StressResult) -> Node:
    return parse(render_stress_page(stress_result))


@pytest.fixture(scope="module")
def sweep_page(book: debtsim.Book, tmp_path_factory: pytest.TempPathFactory) -> Node:
    axes = parse_grid(["pd_scale=0.5,1,2"])
    result = run_sweep(book, axes, RunOptions(copula=False),
                       tmp_path_factory.mktemp("sweep") / "out")
    result = dataclasses.replace(result, notes=("a test warning for the sweep page",))
    made = sweep_charts(result.table, result.axes, result.options.levels, book.currency)
    return parse(render_sweep_page(result, made))


@pytest.fixture(scope="module", params=["run", "stress", "sweep"])
def any_page(request: pytest.FixtureRequest) -> Node:
    return request.getfixturevalue(f"{request.param}_page")


# ------------------------------------------------------- caution, one look
def test_caution_at_the_top_of_every_page(any_page: Node) -> None:
    """Every page shows the one caution text before its first section."""
    caution = any_page.find("div", "caution")
    assert caution.text() == f"Caution. {CAUTION}"
    assert _position(any_page, caution) < _position(any_page, _first_h2(any_page))


def test_every_page_uses_the_one_stylesheet(any_page: Node) -> None:
    """Run, stress and sweep pages share the run page's look: the same stylesheet."""
    styles = any_page.find_all("style")
    assert len(styles) == 1
    assert styles[0].text() == re.sub(r"\s+", " ", STYLE).strip()
    assert any_page.find("main") and any_page.find("header") and any_page.find("footer")


def test_caution_in_readme_and_cli_is_the_same_text(tmp_path: Path) -> None:
    """The README and the command line quote the caution word for word."""
    from typer.testing import CliRunner

    from debtsim.cli import app

    readme = (ROOT / "README.md").read_text(encoding="utf-8")
    flat = re.sub(r"\s+", " ", readme.replace("\n> ", " "))
    assert CAUTION in flat
    result = CliRunner().invoke(app, ["run", str(HARBOUR), "--out", str(tmp_path / "o")])
    assert result.exit_code == 0, result.output
    assert CAUTION in result.output.replace("\n", " ")


# --------------------------------------------------------------- headline
def test_headline_boxes_carry_the_currency(run_page: Node, book: debtsim.Book) -> None:
    """Each headline box names the currency of its figure and of its change."""
    boxes = run_page.find_all("div", "kpi")
    assert len(boxes) == 4
    for box in boxes:
        value = box.find("div", "v")
        assert value.find("span", "cur").text() == book.currency
        change = box.find("div", "d").text()
        assert re.fullmatch(rf"\+[\d,]+ {book.currency} from contagion \(\+\d+\.\d%\)", change)


def test_percentage_points_and_percent_are_labelled(run_page: Node) -> None:
    """Probability changes read "pp", relative changes of amounts read "%"."""
    tables = run_page.find_all("table")
    measures = next(t for t in tables if "Relative change (%)" in t.find("thead").text())
    for row in measures.find("tbody").find_all("tr"):
        assert re.fullmatch(r"[+-]\d+\.\d%", row.find_all("td")[-1].text())
    book_table = next(t for t in tables if "Uplift (pp)" in t.find("thead").text())
    uplifts = [row.find_all("td")[8].text() for row in book_table.find("tbody").find_all("tr")]
    assert uplifts and all(re.fullmatch(r"(\+\d+\.\d\d|0) pp", u) for u in uplifts)


def test_stress_changes_in_pp_and_percent(stress_page: Node) -> None:
    """The stress page: PD changes in pp, measure changes in %."""
    tables = stress_page.find_all("table")
    movers = next(t for t in tables if "Largest change" in t.find("thead").text())
    cells = [r.find_all("td")[-1].text() for r in movers.find("tbody").find_all("tr")]
    assert cells and all(c.endswith(" pp") for c in cells)
    measures = next(t for t in tables if "VaR 99.9%" in t.find("thead").text())
    changes = [s.text() for s in measures.find_all("span", "chg")]
    assert changes and all(re.fullmatch(r"[+-]\d+\.\d%", c) for c in changes)


# ------------------------------------------------- accuracy and appendix
ENGINE_KEYS = ("factor_nodes", "grid_unit", "grid_points", "factor_truncation_mass",
               "discretisation_error", "window_tail_bound")


def test_engine_internals_are_in_the_appendix(run_page: Node) -> None:
    """Grid settings and truncation bounds sit in the appendix, under plain labels."""
    appendix = run_page.find("section", "appendix")
    assert appendix.attrs["id"] == "appendix"
    before = "".join(n.text() for n in _main_children(run_page) if n is not appendix)
    for key in ENGINE_KEYS:
        assert key not in before
        assert key in appendix.text()
    labels = [row.find_all("td")[0].text()
              for body in appendix.find_all("tbody") for row in body.find_all("tr")]
    assert "Factor grid points" in labels
    assert "Probability of the factor outside the grid's range" in labels
    assert all("_" not in label for label in labels)


def test_one_line_on_accuracy_at_the_top(run_page: Node) -> None:
    """One accuracy line before the first section, saying how exact the figures are."""
    lines = run_page.find_all("p", "accuracy")
    assert len(lines) == 1
    assert _position(run_page, lines[0]) < _position(run_page, _first_h2(run_page))
    assert lines[0].text().startswith("Numerical accuracy. Exact on a factor grid of")


def test_sampled_run_says_it_carries_sampling_error(book: debtsim.Book) -> None:
    """On the sampler, the accuracy line gives the scenario count and the ± convention."""
    result = debtsim.run(book, engine="sample", samples=4000, seed=5)
    doc = parse(render_html(result))
    line = doc.find("p", "accuracy").text()
    assert "Sampled from 4,000 scenarios (seed 5)" in line and "±" in line


def test_model_warning_is_a_warning_box_near_the_top(run_result: debtsim.RunResult) -> None:
    """A run's model warning (e.g. the circuit's node error) is a warning box above the figures."""
    warned = dataclasses.replace(run_result, notes=(NODE_WARNING,))
    doc = parse(render_html(warned))
    box = doc.find("div", "warning")
    assert box.attrs.get("role") == "alert"
    assert box.text() == f"Model warning. {NODE_WARNING}"
    assert _position(doc, box) < _position(doc, doc.find("div", "kpis"))
    assert not parse(render_html(run_result)).find_all("div", "warning")


def test_sweep_and_stress_pages_show_warnings(sweep_page: Node) -> None:
    """Study pages carry their model warnings in the same box."""
    box = sweep_page.find("div", "warning")
    assert "a test warning for the sweep page" in box.text()


# ----------------------------------------------------------------- words
def test_pages_use_the_agreed_words(any_page: Node) -> None:
    """"without links (Gaussian copula)", "loss distribution", "PD with contagion"."""
    text = any_page.find("main").text()
    lowered = text.lower()
    assert "loss law" not in lowered
    assert "final pd" not in lowered
    assert "link component" not in lowered
    assert "copula" not in lowered.replace("gaussian copula", "")


def test_run_page_names_the_comparison(run_page: Node) -> None:
    """The measures table heads its comparison column "Without links (Gaussian copula)"."""
    heads = [th.text() for th in run_page.find_all("th")]
    assert "Without links (Gaussian copula)" in heads
    assert "PD with contagion" in heads
    assert WITHOUT_LINKS in run_page.find("main").text()


# ----------------------------------------------------------------- charts
def _extent(fig: Figure, artist: object) -> object:
    return artist.get_window_extent(fig.canvas.get_renderer())  # type: ignore[attr-defined]


def _overlaps(a: object, b: object) -> bool:
    return bool(a.overlaps(b))  # type: ignore[attr-defined]


@pytest.mark.parametrize("binned", [False, True])
def test_loss_histogram_notes_cross_no_marker_line(
    run_result: debtsim.RunResult, binned: bool, monkeypatch: pytest.MonkeyPatch
) -> None:
    """No EL/VaR line crosses the "bar cut" note, and the "not drawn" note is off the plot."""
    if binned:
        monkeypatch.setattr(charts, "MAX_ATOMS_DRAWN", 10)
    fig = charts.loss_distribution_figure(
        run_result.loss_distribution, run_result.measures, run_result.copula_distribution,
        run_result.book.currency,
    )
    ax = fig.axes[0]
    fig.canvas.draw()
    notes = [t for t in ax.texts if isinstance(t, Annotation) and "bar cut" in t.get_text()]
    assert notes, "the dominant no-loss bar is cut and labelled"
    markers = [ln for ln in ax.lines if len(set(ln.get_xdata())) == 1]
    assert len(markers) >= 2
    for note in notes:
        for line in markers:
            assert not _overlaps(_extent(fig, note), _extent(fig, line))
    if binned:
        assert "not drawn" in ax.get_xlabel()
        assert not any("not drawn" in t.get_text() for t in ax.texts)


def test_sweep_legend_hides_no_line(stress_result: debtsim.StressResult) -> None:
    """In a one-parameter sweep chart the legend sits beside the plot, not on the lines."""
    table = stress_result.table.copy()
    table["pd_scale"] = np.arange(len(table), dtype=float)
    fig = line_figure(table, "pd_scale", ["expected_loss", "var_0.99", "var_0.999"], "EUR", "t")
    fig.canvas.draw()
    ax = fig.axes[0]
    legend = ax.get_legend()
    assert not _overlaps(_extent(fig, legend), _extent(fig, ax.patch))


def test_certain_default_does_not_squeeze_the_dot_plot(
    stress_result: debtsim.StressResult,
) -> None:
    """With a PD of 1 in a scenario, the other obligors still spread over the axis."""
    dp = stress_result.default_probabilities
    names = list(stress_result.table["scenario"])
    assert float(dp[names].to_numpy().max()) == pytest.approx(1.0)  # "tug operator fails"
    fig = movers_figure(dp, names, 15)
    ax = fig.axes[0]
    assert ax.get_xscale() == "log"
    base = dp[names[0]].head(15).to_numpy(dtype=float)
    left, right = ax.get_xlim()
    share = (np.log(base.max()) - np.log(base.min())) / (np.log(right) - np.log(left))
    linear_share = (base.max() - base.min()) / 1.0
    assert share > 4 * linear_share


LONG_ID = "FWD_HOLDINGS_INTERNATIONAL_SUBSIDIARY_GROUP_REF_0000123456789"


def test_long_ids_wrap_inside_table_cells() -> None:
    """A long id without spaces wraps inside its cell instead of pushing the table sideways.

    Found by looking at a report of a book with 60-character ids in headless Chromium:
    the link, contribution and book tables ran off the page.
    """
    rules = {sel.strip(): body for sel, body in re.findall(r"([^{}]+)\{([^}]*)\}", STYLE)}
    assert "overflow-wrap:anywhere" in rules["td:not(.n)"]
    assert "nowrap" in rules["td.n"]  # amounts stay on one line
    assert "nowrap" not in rules["td.n, th.n"]  # long headers of number columns may wrap


def test_long_ids_are_shortened_in_chart_labels(monkeypatch: pytest.MonkeyPatch) -> None:
    """Bar-chart labels keep the start and end of a long id and stay within 32 characters."""
    drawn: list[Figure] = []
    monkeypatch.setattr(charts, "png_base64", lambda fig: drawn.append(fig) or "")
    charts.paired_bars_chart([LONG_ID, "SHORT"], [2.0, 1.0], [1.0, 1.0], ("a", "b"), "t")
    labels = [t.get_text() for t in drawn[0].axes[0].get_yticklabels()]
    assert "SHORT" in labels
    shortened = next(t for t in labels if t != "SHORT")
    assert len(shortened) == 32
    assert shortened.startswith("FWD_HOLDINGS") and shortened.endswith("123456789")
    assert "…" in shortened
    assert charts.short_label("$5 loan") == r"\$5 loan"  # still literal for mathtext


def test_exceedance_curves_drop_off_at_the_largest_loss(
    stress_result: debtsim.StressResult, monkeypatch: pytest.MonkeyPatch
) -> None:
    """Each scenario's P(L > l) curve ends by falling below the axis at its largest loss.

    Found in a browser check: curves ended in a flat step at the largest loss, which reads
    as a tail that goes on.
    """
    from debtsim.report import study_charts

    drawn: list[Figure] = []
    monkeypatch.setattr(study_charts, "png_bytes", lambda fig: drawn.append(fig) or b"")
    names = list(stress_result.table["scenario"])
    laws = [run.loss_distribution for run in stress_result.runs]
    study_charts.loss_distributions_chart(names, laws, (0.99, 0.999), "EUR")
    ax = drawn[0].axes[0]
    bottom = ax.get_ylim()[0]
    assert len(ax.lines) >= len(laws)
    for line, law in zip(ax.lines, laws, strict=False):
        x, y = np.asarray(line.get_xdata()), np.asarray(line.get_ydata())
        assert x[-1] == pytest.approx(float(law.losses[-1]))
        assert y[-1] < bottom  # off the bottom of the plot
        assert y[-2] > 0
