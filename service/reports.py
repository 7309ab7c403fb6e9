"""The screening report: one self-contained HTML page about a survey's screening, for an analyst.

What it shows, in order: the key figures; design notes on the instrument (``detectors.lint``)
and any notes or findings the reference sample holds; for each detector the distribution of
its scores with the cut-off and how many respondents were flagged, not assessed or not
applicable; how flags of different detectors coincide; the flag rate by day of arrival; the
answer patterns of the most flagged respondents beside typical ones; and per scale the number
of respondents with a score, the mean, the standard deviation and Cronbach's alpha for
everyone, without the flagged, and without those reviewed as ``exclude``.

Pictures are drawn with matplotlib (Agg, no display) and embedded as base64 PNG; the page has
its styles inline and loads nothing from anywhere, so it opens offline and can be mailed.
Score distributions of large surveys are drawn from a systematic subsample (every k-th
respondent by arrival, at most :data:`DISTRIBUTION_SAMPLE`); every count in the page is exact.
"""

from __future__ import annotations

import base64
import datetime as dt
import html
import io
from collections import Counter
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any, Literal

import numpy as np
from sqlalchemy.orm import Session

from detectors import MISSING, REGISTRY, ResponseMatrix, State, lint
from detectors.reliability import scale_statistics

from . import outcomes
from .db import utcnow
from .models import Decision, ReferenceSample, Survey, Verdict
from .screeners import Screener, screener_for
from .survey_data import SurveyData, read_survey

__all__ = [
    "build_report",
    "DISTRIBUTION_SAMPLE",
    "PATTERN_ROWS",
    "CAUTION",
    "CAUTION_HEAD",
    "reference_findings",
]

#: At most this many respondents' scores are drawn per detector (a systematic subsample).
DISTRIBUTION_SAMPLE = 50_000
#: Respondents shown per group in the answer-pattern picture.
PATTERN_ROWS = 20
#: The drill plants careless respondents among at most this many stored respondents (spread
#: evenly by arrival), at these seeds: enough for shares to 1-2 points, quick to screen.
DRILL_RESPONDENTS, DRILL_SEEDS = 3000, (1, 2, 3)
#: Fewer stored respondents than this and the drill uses answers simulated from the instrument.
DRILL_MIN_RESPONDENTS = 200
#: Keys whose list values in a stored reference are shown as instrument findings.
FINDING_KEYS = ("notes", "findings")
CAUTION_HEAD = "A flag is evidence for a human decision, not a verdict on a person."
CAUTION = (
    "Each flag points a "
    "reviewer at a respondent worth a second look and says why; a genuinely strong opinion, a "
    "short questionnaire or a badly translated item can raise flags too. Decide about "
    "excluding a respondent, or withholding an incentive, only after reading the evidence, and "
    "record the decision as a review."
)

# Colours: steel blue for unflagged, rust for flagged, a cream-to-teal ramp for counts.
BLUE, RUST, INK, GRID, PAPER = "#2a6f97", "#b3541e", "#24313a", "#d5dde3", "#fbfaf6"
ANSWER_LOW, ANSWER_MID, ANSWER_HIGH, ANSWER_MISSING = "#b3541e", "#f2efe6", "#2a6f97", "#2b2b2b"

STYLE = """
body { font-family: "Segoe UI", "Helvetica Neue", Arial, sans-serif; color: #24313a;
       background: #fbfaf6; margin: 0; line-height: 1.45; }
main { max-width: 1120px; margin: 0 auto; padding: 24px 32px 48px; }
h1 { font-size: 1.7em; margin: 0 0 4px; color: #14505c; }
h2 { font-size: 1.25em; margin: 36px 0 8px; padding-bottom: 4px; border-bottom: 2px solid #14505c;
     color: #14505c; }
h3 { font-size: 1.05em; margin: 22px 0 4px; }
p.sub { margin: 0; color: #5b6b75; }
.caution { background: #fff4e5; border-left: 6px solid #b3541e; padding: 12px 16px; margin: 18px 0; }
.caution strong { display: block; margin-bottom: 4px; }
table { border-collapse: collapse; margin: 8px 0 4px; font-size: 0.93em; }
th, td { padding: 4px 10px; border-bottom: 1px solid #d5dde3; text-align: right; }
th { background: #e9eef1; }
td.name, th.name { text-align: left; }
.figures { display: flex; flex-wrap: wrap; gap: 10px 28px; margin: 10px 0; }
.figure { background: #ffffff; border: 1px solid #d5dde3; padding: 10px 14px; min-width: 150px; }
.figure .value { font-size: 1.5em; font-weight: 600; color: #14505c; }
.figure .label { color: #5b6b75; font-size: 0.9em; }
img { max-width: 100%; height: auto; background: #ffffff; border: 1px solid #d5dde3; }
.detectors { display: grid; grid-template-columns: repeat(auto-fill, minmax(500px, 1fr));
             gap: 6px 28px; }
.detector { margin-bottom: 12px; }
.detector h3 { margin-top: 12px; }
.note { color: #5b6b75; font-size: 0.92em; }
ul.notes li { margin-bottom: 3px; }
code { background: #e9eef1; padding: 0 3px; }
footer { margin-top: 40px; font-size: 0.88em; color: #5b6b75; }
"""


# Small helpers -----------------------------------------------------------------------------------


def _e(value: Any) -> str:
    return html.escape(str(value), quote=True)


def _n(value: int) -> str:
    return f"{value:,}"


def _share(part: int, whole: int) -> str:
    return "-" if whole == 0 else f"{100.0 * part / whole:.1f}%"


def _ordinal(n: int) -> str:
    suffix = "th" if 10 <= n % 100 <= 20 else {1: "st", 2: "nd", 3: "rd"}.get(n % 10, "th")
    return f"{n}{suffix}"


def _num(value: float, digits: int = 2) -> str:
    return "-" if value is None or not np.isfinite(value) else f"{value:.{digits}f}"


def _png(figure: Any) -> str:
    buffer = io.BytesIO()
    figure.savefig(buffer, format="png", dpi=100, facecolor="white")
    return base64.b64encode(buffer.getvalue()).decode("ascii")


def _img(figure: Any, alt: str, name: str) -> str:
    return (
        f'<img src="data:image/png;base64,{_png(figure)}" alt="{_e(alt)}" '
        f'data-plot="{_e(name)}">'
    )


def _figure(
    width: float,
    height: float,
    layout: Literal["constrained", "compressed", "tight"] | None = "constrained",
) -> Any:
    from matplotlib.figure import Figure

    return Figure(figsize=(width, height), layout=layout)


def _style_axes(axes: Any) -> None:
    axes.set_facecolor("white")
    for side in ("top", "right"):
        axes.spines[side].set_visible(False)
    axes.spines["left"].set_color(INK)
    axes.spines["bottom"].set_color(INK)
    axes.tick_params(colors=INK, labelsize=9)
    axes.grid(axis="y", color=GRID, linewidth=0.6)
    axes.set_axisbelow(True)


def reference_findings(data: Any, path: str = "") -> list[tuple[str, Any]]:
    """Every ``notes`` or ``findings`` list found anywhere in a stored reference, with where
    it was found (e.g. ``person_fit.notes``)."""
    found: list[tuple[str, Any]] = []
    if isinstance(data, Mapping):
        for key, value in data.items():
            where = f"{path}.{key}" if path else str(key)
            if key in FINDING_KEYS and isinstance(value, list):
                found.extend((where, entry) for entry in value)
            else:
                found.extend(reference_findings(value, where))
    elif isinstance(data, list) and len(data) < 1000:
        for index, value in enumerate(data):
            if isinstance(value, Mapping):
                found.extend(reference_findings(value, f"{path}[{index}]"))
    return found


def _finding_text(entry: Any) -> str:
    if isinstance(entry, Mapping):
        return "; ".join(f"{key}: {value}" for key, value in entry.items())
    return str(entry)


# Reading ----------------------------------------------------------------------------------------


@dataclass
class _DetectorData:
    name: str
    summary: str
    assessed: int
    flagged: int
    not_assessed: int
    not_applicable: int
    scores: np.ndarray  # assessed scores of the subsample
    flags: np.ndarray  # their flags
    cutoffs: np.ndarray  # their cut-offs (NaN where none)
    #: Why respondents of the subsample were not assessed (or not applicable), most common first.
    reasons: list[tuple[str, int]]


def _detector_names(tallies: Mapping[str, Any]) -> list[str]:
    return [name for name in REGISTRY if name in tallies] + sorted(
        name for name in tallies if name not in REGISTRY
    )


def _sample_step(total: int) -> int:
    return max(1, -(-total // DISTRIBUTION_SAMPLE))


def _detector_data(session: Session, stored: SurveyData, step: int) -> dict[str, _DetectorData]:
    """Every detector's counts (exact) and the assessed scores of every ``step``-th
    respondent, with the cut-offs found by screening those respondents again."""
    results = stored.results
    sample = stored.take(slice(None, None, step))
    reasons: dict[str, Counter[str]] = {}
    cutoffs = outcomes.cutoffs_now(session, sample.results.names, _groups(sample), reasons=reasons)
    out = {}
    for j, name in enumerate(results.names):
        present = results.present[:, j]
        if not present.any():
            continue
        states = results.states[:, j]
        assessed = sample.results.present[:, j] & (sample.results.states[:, j] == State.ASSESSED)
        detector = REGISTRY.get(name)
        out[name] = _DetectorData(
            name=name,
            summary=detector.summary if detector is not None else "a detector no longer run",
            assessed=int((present & (states == State.ASSESSED)).sum()),
            flagged=int((present & results.flagged[:, j]).sum()),
            not_assessed=int((present & (states == State.NOT_ASSESSED)).sum()),
            not_applicable=int((present & (states == State.NOT_APPLICABLE)).sum()),
            scores=sample.results.scores[assessed, j],
            flags=sample.results.flagged[assessed, j],
            cutoffs=cutoffs[assessed, j],
            reasons=reasons.get(name, Counter()).most_common(),
        )
    return out


def _groups(stored: SurveyData) -> list[tuple[int, int | None, np.ndarray, ResponseMatrix]]:
    """The respondents of each (survey version, reference sample), as their matrix with
    durations as screening them gives them."""
    seconds = stored.seconds()
    groups: list[tuple[int, int | None, np.ndarray, ResponseMatrix]] = []
    if not len(stored):
        return groups
    pairs = np.stack([stored.version_ids, stored.reference_ids])
    for version_id, reference_id in np.unique(pairs, axis=1).T.tolist():
        rows = np.flatnonzero(
            (stored.version_ids == version_id) & (stored.reference_ids == reference_id)
        )
        answers = stored.answers[np.ix_(rows, stored.layout.columns[version_id])]
        matrix = ResponseMatrix(
            respondent_ids=stored.respondent_ids[rows], answers=answers, durations=seconds[rows]
        )
        groups.append((version_id, None if reference_id < 0 else reference_id, rows, matrix))
    return groups


def _arrivals_by_day(stored: SurveyData) -> list[dict[str, Any]]:
    """Respondents and those flagged by at least one detector, per day of arrival (UTC)."""
    days = stored.received_at.astype("datetime64[D]")
    found, counts = np.unique(days, return_counts=True)
    where = np.searchsorted(found, days)
    flagged = np.bincount(where, weights=stored.flag_counts > 0, minlength=len(found))
    return [
        {"day": str(day), "respondents": int(n), "flagged_any": int(f)}
        for day, n, f in zip(found.tolist(), counts.tolist(), flagged.tolist(), strict=True)
    ]


def _co_occurrence(session: Session, stored: SurveyData, names: Sequence[str]) -> np.ndarray:
    """(detectors x detectors) counts of respondents flagged by both (diagonal: by each)."""
    index = {name: i for i, name in enumerate(names)}
    counts = np.zeros((len(names), len(names)), dtype=np.int64)
    codes = outcomes.detector_codes(session)
    sets, sizes = np.unique(stored.flag_bits[stored.flag_counts > 0], return_counts=True)
    for bits, n in zip(sets.tolist(), sizes.tolist(), strict=True):
        members = [index[f] for f in codes.names(bits) if f in index]
        for a in members:
            for b in members:
                counts[a, b] += int(n)
    return counts


# Pictures ---------------------------------------------------------------------------------------


def _distribution_picture(data: _DetectorData, step: int) -> str:
    from matplotlib.figure import Figure

    figure = Figure(figsize=(6.0, 2.5))
    figure.subplots_adjust(left=0.11, right=0.98, bottom=0.2, top=0.8)
    axes = figure.add_subplot()
    _style_axes(axes)
    scores, flags = data.scores, data.flags
    cutoffs = data.cutoffs[np.isfinite(data.cutoffs)]
    common = Counter(np.round(cutoffs, 6).tolist()).most_common(1)[0][0] if len(cutoffs) else None
    values = np.unique(scores)
    hidden = 0
    clipped = False
    if len(values) <= 40:
        span = float(values.max() - values.min())
        if common is not None:
            span = max(span, abs(common - float(values.min())), abs(float(values.max()) - common))
        width = np.min(np.diff(values)) * 0.8 if len(values) > 1 else 1.0
        width = min(width, max(span, 1.0) / 12)
        low = np.array([np.sum((scores == v) & ~flags) for v in values])
        high = np.array([np.sum((scores == v) & flags) for v in values])
        axes.bar(values, low, width=width, color=BLUE, label="not flagged")
        axes.bar(values, high, width=width, bottom=low, color=RUST, label="flagged")
        clipped = _clip_counts(axes, values, low + high)
    else:
        top = float(np.quantile(scores, 0.995))
        if common is not None:
            top = max(top, common + 0.05 * abs(common))
        bottom = float(scores.min())
        top = max(top, bottom + 1e-9)
        shown = scores <= top
        hidden = int((~shown).sum())
        edges = np.linspace(bottom, top, 41)
        axes.hist(
            [scores[shown & ~flags], scores[shown & flags]], bins=edges.tolist(), stacked=True,
            color=[BLUE, RUST], label=["not flagged", "flagged"],
        )
        heights, _ = np.histogram(scores[shown], bins=edges)
        clipped = _clip_counts(axes, (edges[:-1] + edges[1:]) / 2, heights)
    from matplotlib.artist import Artist
    from matplotlib.lines import Line2D
    from matplotlib.patches import Patch

    handles: list[Artist] = [Patch(color=BLUE, label="not flagged"), Patch(color=RUST, label="flagged")]
    title = "no cut-off"
    if common is not None:
        axes.axvline(common, color=INK, linestyle="--", linewidth=1.2)
        handles.append(Line2D([], [], color=INK, linestyle="--", label="cut-off"))
        title = f"cut-off {common:.4g}"
        if len(cutoffs) and cutoffs.min() != cutoffs.max():
            title = f"cut-offs {cutoffs.min():.4g} to {cutoffs.max():.4g} (line: most common)"
    axes.set_title(title, loc="left", fontsize=10, color=INK)
    label = f"{data.name} score (higher = more suspect)"
    if hidden:
        label += f"; {hidden:,} higher score(s) beyond the axis"
    axes.set_xlabel(label, fontsize=10, color=INK)
    every = f" (every {_ordinal(step)})" if step > 1 else ""
    ylabel = "respondents" + every
    if clipped:
        ylabel += "\n(axis cut: see the number)"
    axes.set_ylabel(ylabel, fontsize=10, color=INK)
    axes.legend(handles=handles, fontsize=9, frameon=False, loc="lower right",
                bbox_to_anchor=(1.0, 1.0), ncols=3, borderaxespad=0.2)
    return _img(figure, f"Distribution of {data.name} scores with the cut-off",
                f"distribution-{data.name}")


#: A bar this many times taller than the next tallest is cut, so that the others stay readable.
CLIP_RATIO = 4.0


def _clip_counts(axes: Any, positions: np.ndarray, heights: np.ndarray) -> bool:
    """Cut the count axis above the second-tallest bar when the tallest dwarfs it (a score
    most respondents share, such as 0 for straightlining), writing the tallest bar's count on
    it; whether the axis was cut."""
    if len(heights) < 2:
        return False
    order = np.argsort(heights)
    tallest, second = int(heights[order[-1]]), int(heights[order[-2]])
    if second <= 0 or tallest < CLIP_RATIO * second:
        return False
    top = 1.6 * second
    axes.set_ylim(0, top)
    axes.annotate(
        f"{tallest:,} \u2191", (float(positions[order[-1]]), top), xytext=(0, -2),
        textcoords="offset points", ha="center", va="top", fontsize=9, color=INK,
        bbox={"boxstyle": "round,pad=0.15", "facecolor": "white", "edgecolor": INK,
              "linewidth": 0.6},
    )
    return True


def _overlap_picture(names: Sequence[str], counts: np.ndarray) -> str:
    from matplotlib.colors import LinearSegmentedColormap

    size = max(3.0, 0.42 * len(names) + 1.6)
    figure = _figure(size + 1.6, size, layout=None)
    figure.subplots_adjust(left=0.24, right=0.98, bottom=0.26, top=0.98)
    axes = figure.add_subplot()
    ramp = LinearSegmentedColormap.from_list("cream-teal", ["#f7f3e8", "#7fb3b8", "#14505c"])
    image = axes.imshow(counts, cmap=ramp, vmin=0)
    axes.set_xticks(range(len(names)), labels=names, rotation=45, ha="right", fontsize=9)
    axes.set_yticks(range(len(names)), labels=names, fontsize=9)
    limit = counts.max() if counts.size else 0
    for a in range(len(names)):
        for b in range(len(names)):
            value = int(counts[a, b])
            axes.text(
                b, a, f"{value:,}", ha="center", va="center", fontsize=7,
                color="white" if limit and value > 0.6 * limit else INK,
            )
    bar = figure.colorbar(image, ax=axes, shrink=0.8)
    bar.set_label("respondents flagged by both", fontsize=9)
    bar.ax.tick_params(labelsize=7)
    return _img(figure, "How often two detectors flag the same respondent", "overlap")


def _days_picture(days: Sequence[Mapping[str, Any]]) -> str:
    figure = _figure(7.4, 2.8)
    axes = figure.add_subplot()
    _style_axes(axes)
    labels = [str(d["day"]) for d in days]
    counts = np.array([d["respondents"] for d in days], dtype=float)
    flagged = np.array([d["flagged_any"] for d in days], dtype=float)
    rates = np.where(counts > 0, 100.0 * flagged / np.maximum(counts, 1), 0.0)
    positions = np.arange(len(days))
    axes.bar(positions, rates, color=RUST, width=0.7)
    axes.set_xlim(-0.75, max(len(days), 7) - 0.25)
    axes.set_ylabel("% flagged (any detector)", fontsize=9, color=INK)
    axes.set_ylim(0, max(10.0, float(rates.max()) * 1.25 if len(rates) else 10.0))
    step = max(1, len(days) // 14)
    axes.set_xticks(positions[::step], labels=labels[::step], rotation=30, ha="right", fontsize=9)
    for x, rate, n in zip(positions, rates, counts, strict=True):
        if len(days) <= 31:
            axes.text(x, rate, f"{rate:.0f}%\nn={int(n):,}", ha="center", va="bottom",
                      fontsize=7, color=INK)
    axes.set_xlabel("day of arrival (UTC)", fontsize=9, color=INK)
    return _img(figure, "Share of respondents flagged, by day of arrival", "days")


def _patterns_picture(
    item_ids: Sequence[str],
    groups: Sequence[tuple[str, np.ndarray, Sequence[str]]],
    lowest: int,
    highest: int,
) -> str:
    from matplotlib.colors import LinearSegmentedColormap

    ramp = LinearSegmentedColormap.from_list(
        "answers", [ANSWER_LOW, ANSWER_MID, ANSWER_HIGH], N=max(2, highest - lowest + 1)
    ).with_extremes(bad=ANSWER_MISSING)
    rows = max(len(ids) for _, _, ids in groups)
    figure = _figure(max(7.4, 0.16 * len(item_ids) + 3.0), 0.2 * rows + 1.8)
    panels = figure.subplots(1, len(groups), sharey=False)
    panels = np.atleast_1d(panels)
    image = None
    for axes, (title, answers, ids) in zip(panels, groups, strict=True):
        shown = np.ma.masked_invalid(answers.astype(float)) if len(answers) else np.ma.zeros(
            (0, len(item_ids))
        )
        image = axes.imshow(shown, cmap=ramp, vmin=lowest - 0.5, vmax=highest + 0.5,
                            aspect="auto", interpolation="nearest")
        axes.set_title(title, fontsize=9, color=INK)
        axes.set_yticks(range(len(ids)), labels=list(ids), fontsize=6)
        step = max(1, len(item_ids) // 25)
        axes.set_xticks(range(0, len(item_ids), step),
                        labels=list(item_ids)[::step], rotation=90, fontsize=6)
        axes.set_xlabel("items in presentation order", fontsize=9, color=INK)
    if image is not None:
        bar = figure.colorbar(image, ax=list(panels), shrink=0.8,
                              ticks=list(range(lowest, highest + 1)))
        bar.set_label("answer (black: unanswered)", fontsize=9)
        bar.ax.tick_params(labelsize=7)
    return _img(figure, "Answer patterns of the most flagged respondents beside typical ones",
                "patterns")


# Sections ---------------------------------------------------------------------------------------


def _figures(items: Iterable[tuple[str, str]]) -> str:
    cells = "".join(
        f'<div class="figure"><div class="value">{_e(value)}</div>'
        f'<div class="label">{_e(label)}</div></div>'
        for value, label in items
    )
    return f'<div class="figures">{cells}</div>'


def _table(header: Sequence[str], rows: Iterable[Sequence[Any]], names: int = 1) -> str:
    head = "".join(
        f'<th class="name">{_e(h)}</th>' if i < names else f"<th>{_e(h)}</th>"
        for i, h in enumerate(header)
    )
    body = "".join(
        "<tr>" + "".join(
            f'<td class="name">{_e(v)}</td>' if i < names else f"<td>{_e(v)}</td>"
            for i, v in enumerate(row)
        ) + "</tr>"
        for row in rows
    )
    return f"<table><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>"


def _answers_shown(stored: SurveyData, rows: np.ndarray, screener: Screener) -> np.ndarray:
    """Answers of the respondents at ``rows`` in the version's item order, NaN where missing."""
    answers = stored.answers[np.ix_(rows, stored.layout.columns[screener.version_id])]
    return np.where(answers == MISSING, np.nan, answers.astype(np.float64))


def _pattern_section(stored: SurveyData, screener: Screener) -> str:
    current = stored.version_ids == screener.version_id
    flagged = np.flatnonzero(current & (stored.flag_counts > 0))
    # Most flags first, then the highest careless score (none last), then by arrival.
    careless = stored.careless_scores[flagged]
    order = np.lexsort((
        stored.pks[flagged], np.where(np.isnan(careless), np.inf, -careless),
        -stored.flag_counts[flagged],
    ))
    most_rows = flagged[order[:PATTERN_ROWS]]
    calm = np.flatnonzero(current & (stored.flag_counts == 0))
    if len(calm) > PATTERN_ROWS:
        calm = calm[np.linspace(0, len(calm) - 1, PATTERN_ROWS).round().astype(int)]
    if not len(most_rows) and not len(calm):
        return '<p class="note">No respondents of the current version yet.</p>'
    items = screener.instrument.item_ids
    groups = []
    if len(most_rows):
        groups.append((f"Most flagged ({len(most_rows)})", _answers_shown(stored, most_rows,
                       screener), stored.respondent_ids[most_rows].tolist()))
    if len(calm):
        groups.append((f"Typical: no flags ({len(calm)}, spread over arrival)",
                       _answers_shown(stored, calm, screener),
                       stored.respondent_ids[calm].tolist()))
    instrument = screener.instrument
    picture = _patterns_picture(
        items, groups, int(instrument.lowest.min()), int(instrument.highest.max())
    )
    return (
        f"{picture}<p class=\"note\">Each row is a respondent (id on the left), each column an "
        "item in the order respondents saw them; colour is the answer given (rust low, cream "
        "middle, blue high), black an unanswered item. Most flagged: the respondents with "
        "the most flags (then the highest careless score). Typical: respondents without any "
        "flag, picked evenly across the order of arrival. Straight lines, stripes and "
        "checkerboards stand out; the flags say which index saw what.</p>"
    )


def _scale_section(stored: SurveyData, screener: Screener) -> str:
    instrument = screener.instrument
    if not instrument.scales:
        return '<p class="note">The instrument defines no scales.</p>'
    members, answers = stored.of_version(screener.version_id)
    if len(members) == 0:
        return '<p class="note">No respondents of the current version yet.</p>'
    matrix = ResponseMatrix(respondent_ids=stored.respondent_ids[members], answers=answers)
    groups = {
        "everyone": None,
        "without the flagged": stored.flag_counts[members] == 0,
        "without those reviewed as exclude": stored.decisions[members] != Decision.EXCLUDE.value,
    }
    tables = {label: scale_statistics(instrument, matrix, keep).set_index("scale")
              for label, keep in groups.items()}
    header = ["scale", "items"]
    for label in groups:
        header += [f"{label}: respondents", "mean", "SD", "alpha"]
    rows = []
    for scale, columns in instrument.scales.items():
        row: list[Any] = [scale, len(columns)]
        for table in tables.values():
            line = table.loc[scale].to_dict()
            row += [_n(int(line["respondents"])), _num(line["mean"]), _num(line["sd"]),
                    _num(line["alpha"], 3)]
        rows.append(row)
    counts = ", ".join(
        f"{label}: {_n(int(len(members) if keep is None else keep.sum()))}"
        for label, keep in groups.items()
    )
    return (
        _table(header, rows)
        + f'<p class="note">Respondents of the current version in each column ({counts}). '
        "A respondent's scale score is the mean of the scale's answered items after reverse "
        "keying, when at least half of them are answered; respondents counts those with a "
        "score. SD is the standard deviation of the scores (divisor n - 1). Alpha is "
        "Cronbach's alpha, k/(k-1) (1 - sum of item variances / variance of the sum), with "
        "each covariance over the respondents who answered both items (Cronbach, 1951). A "
        "large change in alpha or in the spread when flagged respondents are left out is a "
        "sign that they distort the scales; it is not by itself a reason to exclude anyone.</p>"
    )


def _drill_section(stored: SurveyData, screener: Screener) -> str:
    """What this questionnaire can catch: careless respondents planted among the survey's own
    respondents (or simulated ones), screened, and counted. Labelled as a simulation."""
    from detectors.planting import drill_summary

    instrument = screener.instrument
    rows = np.flatnonzero(stored.version_ids == screener.version_id)
    ordinary = None
    if len(rows) >= DRILL_MIN_RESPONDENTS:
        if len(rows) > DRILL_RESPONDENTS:
            rows = rows[np.linspace(0, len(rows) - 1, DRILL_RESPONDENTS).round().astype(int)]
        ordinary = ResponseMatrix.from_arrays(
            instrument, _answers_shown(stored, rows, screener), stored.respondent_ids[rows]
        )
    result = drill_summary(instrument, ordinary, seeds=DRILL_SEEDS)
    source = (
        f"answers simulated from the instrument (fewer than {DRILL_MIN_RESPONDENTS} respondents "
        "of the current version are stored)"
        if ordinary is None
        else f"{_n(len(rows))} of this survey's respondents (current version)"
    )
    parts = [
        '<p class="note" id="drill-label"><strong>Simulation.</strong> Careless respondents of '
        "each kind below were generated by published recipes and planted, one in "
        f"{round(1 / result['careless_share'])}, among {_e(source)}; the whole set was "
        "screened as the service screens a survey. Figures are means over seeds "
        f"{', '.join(map(str, DRILL_SEEDS))}. They show what the design (items per scale, "
        "keying balance, points, blocks) allows; real careless answering is more varied, and "
        "the survey's own careless respondents are counted here among the ordinary ones.</p>",
        _table(
            ["careless kind", "recipe", "sent to review", "likely careless",
             "ROC AUC of the careless score"],
            [
                [kind, result["recipes"][kind], _pct(f["not_ok"]), _pct(f["likely_careless"]),
                 _num(f["auc"], 3)]
                for kind, f in result["kinds"].items()
            ],
        ),
        f'<p>Ordinary respondents sent to review: {_pct(result["ordinary"]["not_ok"])} '
        f'(likely careless: {_pct(result["ordinary"]["likely_careless"])}); the verdict policy '
        f'means to send {_pct(result["review_rate"])}. All planted kinds together: '
        f'{_pct(result["careless_not_ok"])} sent to review.</p>',
        _table(
            ["index", "ordinary respondents flagged", "stated false-alarm rate"],
            [
                [name, _pct(f["flagged"], 2),
                 "fixed rule" if f.get("expected") is None else _pct(f["expected"], 2)]
                for name, f in result["per_index"].items()
            ],
        ),
        '<p class="note">Sources of the recipes: ' + " ".join(_e(s) for s in result["sources"])
        + "</p>",
    ]
    return '<section id="drill">' + "".join(parts) + "</section>"


def _verdicts_note(stored: SurveyData, total: int, flagged_any: int) -> str:
    """How the flagged respondents and the verdicts fit together, in counts that add up: a
    respondent flagged only for a response style keeps the verdict ok, and the careless score
    can send a respondent no detector flagged to review."""
    verdicts = stored.verdicts.astype(str)
    flagged = stored.flag_counts > 0
    names = stored.results.names
    style = [
        j for j, name in enumerate(names) if getattr(REGISTRY.get(name), "family", "") == "style"
    ]
    other = [j for j in range(len(names)) if j not in style]
    style_only = flagged & ~stored.results.flagged[:, other].any(axis=1)

    def count(mask: np.ndarray) -> int:
        return int(mask.sum())

    ok, review, likely = (verdicts == Verdict.OK), (verdicts == Verdict.REVIEW), (
        verdicts == Verdict.LIKELY_CARELESS)
    parts = [
        f"Of the {_n(total)} respondents, {_n(count(ok))} have the verdict ok, "
        f"{_n(count(review))} review and {_n(count(likely))} likely careless.",
        f"Of the {_n(flagged_any)} flagged by at least one detector, "
        f"{_n(count(flagged & review))} are to review, {_n(count(flagged & likely))} likely "
        f"careless and {_n(count(flagged & ok))} ok",
    ]
    if count(flagged & ok):
        parts[-1] += (
            f" ({_n(count(style_only & ok))} of them flagged only for a response style, which "
            "describes how someone answers, not carelessness)"
        )
    parts[-1] += "."
    unflagged = ~flagged & ~ok
    if count(unflagged):
        parts.append(
            f"{_n(count(unflagged))} respondent(s) no detector flagged have a verdict other than "
            "ok because of their careless score."
        )
    return '<p class="note" id="verdict-counts">' + _e(" ".join(parts)) + "</p>"


def _reasons_note(reasons: Sequence[tuple[str, int]]) -> str:
    """Why a detector judged nobody or not everyone: its reasons in the screened subsample."""
    shown = reasons[:3]
    text = "; ".join(f"{reason} ({_n(count)})" for reason, count in shown)
    more = f"; and {len(reasons) - len(shown)} other reason(s)" if len(reasons) > len(shown) else ""
    return (
        '<p class="note reasons">Why respondents were not assessed or the detector did not '
        f"apply (respondents of the pictured sample): {_e(text)}{_e(more)}.</p>"
    )


def _pct(share: float, digits: int = 1) -> str:
    return f"{100 * share:.{digits}f}%"


def build_report(
    session: Session,
    survey: Survey,
    *,
    now: dt.datetime | None = None,
    stored: SurveyData | None = None,
) -> str:
    """The screening report of a survey as one self-contained HTML page. ``stored``: the
    survey as already read (the nightly job shares one read with the export); read here
    otherwise."""
    now = now or utcnow()
    if stored is None:
        stored = read_survey(session, survey)
    total = len(stored)
    flagged_any = int((stored.flag_counts > 0).sum())
    # None (not reviewed) reads "None" as text; no decision is called that.
    decisions, decided = np.unique(stored.decisions.astype(str), return_counts=True)
    reviewed = {
        ("none" if d == "None" else d): n
        for d, n in zip(decisions.tolist(), decided.tolist(), strict=True)
    }
    days = _arrivals_by_day(stored)
    assert survey.current_version_id is not None  # set when the survey is registered
    screener = screener_for(session, survey.current_version_id)
    instrument = screener.instrument
    numbers = stored.layout.numbers
    found, counted = np.unique(stored.verdicts.astype(str), return_counts=True)
    verdicts = {Verdict(v): int(n) for v, n in zip(found.tolist(), counted.tolist(), strict=True)}
    on_current = int((stored.version_ids == survey.current_version_id).sum())
    reference = (
        session.get(ReferenceSample, survey.current_reference_id)
        if survey.current_reference_id is not None else None
    )
    parts: list[str] = []
    title = survey.title or survey.survey
    parts.append(
        f"<header><h1>Screening report: {_e(title)}</h1>"
        f'<p class="sub">Survey <code>{_e(survey.survey)}</code>, version '
        f"{numbers.get(survey.current_version_id, '?')}; made {now:%Y-%m-%d %H:%M} UTC "
        "by Heedful</p></header>"
    )
    parts.append(
        f'<aside class="caution" role="note" id="caution"><strong>{_e(CAUTION_HEAD)}</strong>'
        f"{_e(CAUTION)}</aside>"
    )

    parts.append("<h2>Key figures</h2>")
    parts.append(
        _figures(
            [
                (_n(total), "respondents stored"),
                (f"{_n(flagged_any)} ({_share(flagged_any, total)})",
                 "flagged by at least one detector"),
                (_n(int(verdicts.get(Verdict.OK, 0))), "verdict: ok"),
                (_n(int(verdicts.get(Verdict.REVIEW, 0))), "verdict: review"),
                (_n(int(verdicts.get(Verdict.LIKELY_CARELESS, 0))), "verdict: likely careless"),
                (_n(int(reviewed.get("exclude", 0))), "reviewed as exclude"),
                (_n(int(reviewed.get("keep", 0))), "reviewed as keep"),
                (_n(int(reviewed.get("none", 0))), "not reviewed yet"),
            ]
        )
    )
    parts.append(_verdicts_note(stored, total, flagged_any))
    if reference is not None:
        parts.append(
            f'<p class="note">Reference sample {reference.id}: estimated from '
            f"{_n(reference.respondents)} respondents on {reference.created_at:%Y-%m-%d %H:%M} "
            "UTC; sample-based detectors (such as the Mahalanobis distance) and the careless "
            "score measure respondents against it.</p>"
        )
    else:
        parts.append(
            '<p class="note">No reference sample yet: sample-based detectors could not judge '
            "anyone and no careless score was computed. A re-screen or the nightly run "
            "estimates one once enough respondents are stored.</p>"
        )

    parts.append("<h2>The instrument</h2>")
    notes = lint(instrument)
    parts.append(
        f"<p>{len(instrument.items)} items, {len(instrument.scales)} scale(s), "
        f"{len(instrument.blocks)} block(s), {len(instrument.pairs)} opposite pair(s).</p>"
    )
    if notes:
        parts.append("<h3>Design notes</h3><ul class=\"notes\" id=\"lint-notes\">" + "".join(
            f"<li><strong>{_e(n.location)}</strong>: {_e(n.message)} "
            f"<span class=\"note\">[{_e(n.code)}]</span></li>"
            for n in notes
        ) + "</ul>")
    else:
        parts.append('<p class="note" id="lint-notes">No design notes: nothing in the '
                     "instrument's design limits screening.</p>")
    findings = reference_findings(reference.data) if reference is not None else []
    if findings:
        parts.append(
            "<h3>Findings from the reference sample</h3>"
            '<ul class="notes" id="reference-findings">' + "".join(
                f"<li><strong>{_e(where)}</strong>: {_e(_finding_text(entry))}</li>"
                for where, entry in findings
            ) + "</ul>"
        )

    parts.append("<h2>What this questionnaire can catch</h2>")
    parts.append(_drill_section(stored, screener))

    parts.append("<h2>Detectors</h2>")
    step = _sample_step(total)
    detectors = _detector_data(session, stored, step)
    names = _detector_names(detectors)
    parts.append(
        '<p class="note">For each detector: how its scores are spread, with the cut-off at or '
        "above which a respondent is flagged (dashed line; flagged respondents in rust), and "
        "how many respondents it flagged, could not judge (not assessed, e.g. too few answers) "
        "or does not apply to (not applicable, e.g. no midpoint on the scale). Where the "
        "cut-off depends on how many items a respondent answered, the picture gives its range "
        "and draws the most common one."
        + (
            f" The pictures are drawn from every {_ordinal(step)} respondent by arrival; the "
            "counts are of everyone."
            if step > 1 else ""
        )
        + "</p>"
    )
    parts.append('<div class="detectors">')
    for name in names:
        data = detectors[name]
        parts.append(f'<div class="detector" id="detector-{_e(name)}"><h3>{_e(name)}</h3>'
                     f'<p class="note">{_e(data.summary)}</p>')
        if len(data.scores):
            parts.append(_distribution_picture(data, step))
        else:
            parts.append('<p class="note">No respondent was assessed by this detector.</p>')
        if data.reasons and (data.not_assessed or data.not_applicable):
            parts.append(_reasons_note(data.reasons))
        parts.append(
            _table(
                ["assessed", "flagged", "flag rate (of assessed)", "not assessed",
                 "not applicable"],
                [[_n(data.assessed), _n(data.flagged), _share(data.flagged, data.assessed),
                  _n(data.not_assessed), _n(data.not_applicable)]],
                names=0,
            )
            + "</div>"
        )
    parts.append("</div>")

    parts.append("<h2>Flags that come together</h2>")
    counts = _co_occurrence(session, stored, names)
    if counts.sum():
        flagging = [i for i in range(len(names)) if counts[i, i] > 0]
        parts.append(
            _overlap_picture([names[i] for i in flagging], counts[np.ix_(flagging, flagging)])
        )
        parts.append(
            '<p class="note">Each cell counts respondents flagged by both the row\'s and the '
            "column's detector; the diagonal counts those flagged by each. Detectors of the "
            "same kind (e.g. straightlining and long_string) are expected to agree; agreement "
            "between different kinds of evidence is the stronger sign of careless "
            "answering. Detectors that flagged nobody are left out.</p>"
        )
    else:
        parts.append('<p class="note">No respondent has been flagged.</p>')

    parts.append("<h2>Flag rate by day of arrival</h2>")
    if days:
        parts.append(_days_picture(days))
        parts.append(
            '<p class="note">Bars: the share of the day\'s respondents flagged by at least one '
            "detector (n: respondents that day). A day that stands out can point to a sample "
            "source, a reminder mailing or an incentive that drew inattentive answers.</p>"
        )
    else:
        parts.append('<p class="note">No respondents yet.</p>')

    parts.append("<h2>Answer patterns</h2>")
    parts.append(_pattern_section(stored, screener))

    parts.append("<h2>Scales</h2>")
    if on_current < total:
        parts.append(
            f'<p class="note">{_n(total - on_current)} respondent(s) of earlier survey versions '
            "are left out of this section and of the answer patterns.</p>"
        )
    parts.append(_scale_section(stored, screener))

    parts.append(
        "<footer><p>Heedful screening report. Scores are higher where a respondent is more "
        "suspect; each detector's cut-off is a named setting of the instrument. The verdict "
        "counts the kinds of evidence that raised flags. "
        f"{_e(CAUTION_HEAD)} {_e(CAUTION)}</p></footer>"
    )
    body = "\n".join(parts)
    return (
        "<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
        f"<title>Screening report: {_e(survey.survey)}</title>"
        '<meta name="viewport" content="width=device-width, initial-scale=1">'
        f"<style>{STYLE}</style></head><body><main>\n{body}\n</main></body></html>\n"
    )
