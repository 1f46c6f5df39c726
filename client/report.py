"""A pool's report: one PNG with three panels and a self-contained HTML page.

Panels:
1. estimate and its bounds against the labels used (from GetEstimateTrace): with a gate
   threshold, the gate's own one-sided bounds against the threshold line; without one,
   the two-sided intervals;
2. per-segment estimates with their two-sided intervals (GetEstimate for each segment);
3. each draw's selection probability, relative to uniform random sampling, against the
   surrogate's expected loss for the drawn item (from ListDraws).

The HTML page embeds each panel as a base64 PNG, so it can be mailed or archived as one
file. Rendering uses matplotlib's Agg canvas directly (no pyplot state, no display).
"""

from __future__ import annotations

import base64
import html
import io
import logging
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
from matplotlib.axes import Axes
from matplotlib.figure import Figure
from matplotlib.ticker import NullFormatter

from leadline.client._client import Client
from leadline.client._enums import enum_name
from leadline.client._results import Estimate, GateResult, Verdict
from leadline.v1 import leadline_pb2

__all__ = ["ReportData", "ReportFiles", "collect_report_data", "render_report", "write_report"]

_LOG = logging.getLogger(__name__)
_PANEL_SIZE = (6.4, 4.2)


@dataclass(frozen=True)
class ReportData:
    """Everything a report shows, fetched once (see :func:`collect_report_data`)."""

    pool: leadline_pb2.Pool
    estimate: Estimate
    trace: list[Estimate]
    segments: dict[str, Estimate]
    draws: list[leadline_pb2.Draw]
    gate: GateResult | None = None
    max_risk: float | None = None
    # With a gate: the trace with each bound one-sided at the gate's confidence (the
    # bounds the gate decides on), see gate_trace_confidence.
    gate_trace: list[Estimate] = field(default_factory=list)
    # A risk known from outside the estimator (e.g. a demo's hidden labels), drawn as a line.
    reference_risk: float | None = None
    reference_label: str = "true risk"
    # Per-segment counterparts of reference_risk, drawn as markers on the segment panel.
    reference_segment_risks: dict[str, float] = field(default_factory=dict)
    generated_at: str = field(
        default_factory=lambda: time.strftime("%Y-%m-%d %H:%M:%S UTC", time.gmtime())
    )


@dataclass(frozen=True)
class ReportFiles:
    png: Path
    html: Path


def gate_trace_confidence(confidence: float) -> float:
    """The two-sided level whose interval ends are one-sided bounds at ``confidence``.

    Each end of a two-sided interval at level 2c - 1 leaves (1 - (2c - 1)) / 2 = 1 - c in
    its tail, exactly what a one-sided bound at c leaves (the server builds both sides of
    every interval with the same tail share; textbook equal-tailed intervals). So the
    trace at 2c - 1 draws the very bounds a gate at c decides on.
    """
    return 2.0 * confidence - 1.0


def collect_report_data(
    client: Client,
    pool: str,
    *,
    confidence: float = 0.0,
    max_risk: float | None = None,
    bound: str | None = None,
    max_points: int = 60,
    reference_risk: float | None = None,
    reference_label: str = "true risk",
    reference_segment_risks: dict[str, float] | None = None,
) -> ReportData:
    """Fetch the pool, its estimate, trace, per-segment estimates, draws and (with
    ``max_risk``) a gate result. Needs a token with the reader role."""
    info = client.get_pool(pool)
    estimate = client.get_estimate(pool, confidence=confidence)
    trace = client.get_estimate_trace(pool, confidence=confidence, max_points=max_points)
    segments = {
        segment: client.get_estimate(pool, confidence=confidence, segment=segment)
        for segment in info.segments
    }
    draws = client.list_draws(pool)
    gate = None
    gate_trace: list[Estimate] = []
    if max_risk is not None:
        gate = client.check_gate(pool, max_risk=max_risk, confidence=confidence, bound=bound)
        gate_trace = client.get_estimate_trace(
            pool,
            confidence=gate_trace_confidence(gate.estimate.confidence),
            max_points=max_points,
        )
    return ReportData(
        pool=info,
        estimate=estimate,
        trace=trace,
        segments=segments,
        draws=draws,
        gate=gate,
        max_risk=max_risk,
        gate_trace=gate_trace,
        reference_risk=reference_risk,
        reference_label=reference_label,
        reference_segment_risks=dict(reference_segment_risks or {}),
    )


# -- panels ---------------------------------------------------------------------------------


def _legend(ax: Axes, *, columns: int = 2) -> None:
    """A legend below the axes, so it never hides the data or the notes; none when empty."""
    handles, labels = ax.get_legend_handles_labels()
    if handles:
        ax.legend(
            fontsize=7,
            loc="upper center",
            bbox_to_anchor=(0.5, -0.2),
            ncols=columns,
            frameon=False,
        )


def _draw_trace(ax: Axes, data: ReportData) -> None:
    gate = data.gate
    trace = data.gate_trace if gate is not None else data.trace
    if trace:
        labels = np.array([point.labels_used for point in trace])
        if gate is not None:
            level = f"one-sided {gate.estimate.confidence:.0%} {gate.bound}"
            anytime = gate.bound == "anytime"
            upper = [p.anytime_upper if anytime else p.upper for p in trace]
            lower = [p.anytime_lower if anytime else p.lower for p in trace]
            ax.plot(labels, upper, "-", color="tab:purple", lw=1.5, label=f"{level} upper bound")
            ax.plot(labels, lower, "--", color="tab:purple", lw=1, label=f"{level} lower bound")
            ax.set_title("Estimate and the gate's bounds vs labels used")
        else:
            confidence = data.estimate.confidence
            ax.fill_between(
                labels,
                [p.lower for p in trace],
                [p.upper for p in trace],
                alpha=0.3,
                color="tab:blue",
                label=f"two-sided {confidence:.0%} fixed-time interval",
            )
            ax.plot(labels, [p.anytime_lower for p in trace], "--", color="tab:purple", lw=1)
            ax.plot(
                labels,
                [p.anytime_upper for p in trace],
                "--",
                color="tab:purple",
                lw=1,
                label=f"two-sided {confidence:.0%} anytime interval",
            )
            ax.set_title("Estimate and bounds vs labels used")
        ax.plot(labels, [p.risk for p in trace], "o-", color="tab:blue", ms=3, label="estimate")
    else:
        ax.text(0.5, 0.5, "no labels yet", ha="center", va="center", transform=ax.transAxes)
        ax.set_title("Estimate and bounds vs labels used")
    _reference_lines(ax, data, horizontal=True)
    ax.set_xlabel("labels used")
    ax.set_ylabel("risk (mean loss)")
    _legend(ax)
    ax.grid(alpha=0.3)


def _reference_lines(ax: Axes, data: ReportData, *, horizontal: bool) -> None:
    line = ax.axhline if horizontal else ax.axvline
    if data.max_risk is not None:
        line(data.max_risk, color="tab:red", lw=1.2, label=f"gate threshold {_fmt(data.max_risk)}")
    if data.reference_risk is not None:
        line(
            data.reference_risk,
            color="black",
            lw=1,
            ls=":",
            label=f"{data.reference_label} {data.reference_risk:.4f}",
        )


def _draw_segments(ax: Axes, data: ReportData) -> None:
    rows = [("whole pool", data.estimate), *sorted(data.segments.items())]
    y = np.arange(len(rows))[::-1]
    for position, (_name, est) in zip(y, rows, strict=True):
        ax.plot(
            [est.anytime_lower, est.anytime_upper],
            [position, position],
            color="tab:purple",
            lw=1,
            alpha=0.7,
        )
        ax.plot([est.lower, est.upper], [position, position], color="tab:blue", lw=4, alpha=0.6)
        ax.plot([est.risk], [position], "o", color="tab:blue", ms=5)
        # Above its own interval, centred on the estimate: inside the axes, clear of the
        # legend (which sits below the axes).
        ax.annotate(
            f"{est.labels_used:,} labels",
            (est.risk, position),
            xytext=(0, 6),
            textcoords="offset points",
            ha="center",
            fontsize=7,
        )
    ax.set_yticks(y, [name for name, _ in rows], fontsize=8)
    ax.set_ylim(-0.6, len(rows) - 0.3)
    _reference_lines(ax, data, horizontal=False)
    marked = [
        (p, data.reference_segment_risks[name])
        for p, (name, _) in zip(y, rows, strict=True)
        if name in data.reference_segment_risks
    ]
    if marked:
        ax.plot(
            [r for _, r in marked],
            [p for p, _ in marked],
            "x",
            color="black",
            ms=7,
            label=f"{data.reference_label} per segment",
        )
    confidence = data.estimate.confidence
    ax.set_xlabel(
        f"risk: estimate, two-sided {confidence:.0%} fixed-time (thick) and anytime (thin)"
    )
    ax.set_title("Per-segment estimates")
    ax.grid(alpha=0.3, axis="x")
    _legend(ax)


def _draw_selection(ax: Axes, data: ReportData) -> None:
    draws = [d for d in data.draws if d.remaining_count > 0]
    if not draws:
        ax.text(0.5, 0.5, "no draws yet", ha="center", va="center", transform=ax.transAxes)
    else:
        expected = np.array([d.expected_loss for d in draws])
        relative = np.array([d.selection_probability * d.remaining_count for d in draws])
        labeled = np.array([d.status == leadline_pb2.DRAW_STATUS_LABELED for d in draws])
        ax.scatter(expected[labeled], relative[labeled], s=10, alpha=0.7, label="labeled")
        if (~labeled).any():
            ax.scatter(
                expected[~labeled],
                relative[~labeled],
                s=10,
                alpha=0.7,
                marker="x",
                color="tab:orange",
                label="pending / skipped",
            )
        ax.axhline(1.0, color="gray", lw=1, ls="--", label="uniform random sampling")
        if relative.min() > 0:
            ax.set_yscale("log")
            # Plain 1-2-5 ticks (0.5, 1, 2) read better than 5x10^-1 for ratios near 1.
            low, high = relative.min() / 1.2, relative.max() * 1.2
            ticks = [
                m * 10.0**e for e in range(-4, 4) for m in (1, 2, 5) if low <= m * 10.0**e <= high
            ]
            ax.set_ylim(low, high)
            ax.set_yticks(ticks, [f"{t:g}" for t in ticks])
            ax.yaxis.set_minor_formatter(NullFormatter())
    ax.set_xlabel("surrogate's expected loss of the drawn item")
    ax.set_ylabel("selection probability x remaining items")
    ax.set_title("Which items were drawn, and how likely")
    ax.grid(alpha=0.3)
    _legend(ax)


_PANELS: tuple[tuple[str, Callable[[Axes, ReportData], None]], ...] = (
    ("Estimate and bounds vs labels used", _draw_trace),
    ("Per-segment estimates", _draw_segments),
    ("Selection probability vs surrogate expected loss", _draw_selection),
)


def _png(figure: Figure) -> bytes:
    buffer = io.BytesIO()
    figure.savefig(buffer, format="png", dpi=110)
    return buffer.getvalue()


def render_report(data: ReportData) -> tuple[bytes, list[tuple[str, bytes]]]:
    """The combined PNG and, per panel, (title, PNG bytes)."""
    combined = Figure(figsize=(_PANEL_SIZE[0] * 3, _PANEL_SIZE[1]), layout="constrained")
    axes = combined.subplots(1, 3)
    combined.suptitle(f"leadline report: {data.pool.name} ({data.generated_at})")
    for ax, (_, draw) in zip(axes, _PANELS, strict=True):
        draw(ax, data)
    panels = []
    for title, draw in _PANELS:
        figure = Figure(figsize=_PANEL_SIZE, layout="constrained")
        draw(figure.subplots(), data)
        panels.append((title, _png(figure)))
    return _png(combined), panels


# -- HTML -----------------------------------------------------------------------------------


def _fmt(value: float) -> str:
    """Every risk, bound and loss in the report: four decimals."""
    return f"{value:.4f}"


def _count(value: int) -> str:
    """Every count in the report: thousands separated."""
    return f"{value:,}"


def _estimate_row(name: str, est: Estimate) -> str:
    cells = [
        name,
        _fmt(est.risk),
        f"[{_fmt(est.lower)}, {_fmt(est.upper)}]",
        f"[{_fmt(est.anytime_lower)}, {_fmt(est.anytime_upper)}]",
        _count(est.labels_used),
        _count(est.items_in_scope),
        str(est.mode),
        str(est.surrogate_version),
    ]
    return "<tr>" + "".join(f"<td>{html.escape(c)}</td>" for c in cells) + "</tr>"


def _gate_html(gate: GateResult) -> str:
    """The verdict and the bound it rests on, labeled one-sided, in the report's format."""
    esc = html.escape
    level = f"one-sided {gate.estimate.confidence:.0%} {gate.bound}"
    threshold = _fmt(gate.max_risk)
    if gate.verdict is Verdict.PASS:
        rests = f"the {level} upper bound {_fmt(gate.upper)} is below {threshold}"
    elif gate.verdict is Verdict.FAIL:
        rests = f"the {level} lower bound {_fmt(gate.lower)} is above {threshold}"
    else:
        rests = (
            f"the {level} bounds {_fmt(gate.lower)} (lower) and {_fmt(gate.upper)} (upper) "
            f"lie on both sides of {threshold}"
        )
        if gate.unlabeled == 0:
            rests += "; every item in scope is labeled, more labels cannot decide it"
        elif gate.labels_may_not_suffice:
            rests += (
                f"; even labeling all {_count(gate.unlabeled)} unlabeled items in scope may "
                "not decide it"
            )
        elif gate.more_labels_hint:
            rests += f"; about {_count(gate.more_labels_hint)} more labels may decide it"
    return (
        f'<p class="verdict">Gate: {esc(str(gate.verdict).upper())} (risk below {threshold} '
        f"at {gate.estimate.confidence:.0%} confidence, {esc(str(gate.bound))} bound)</p>"
        f"<p>{esc(rests[0].upper() + rests[1:])}, after {_count(gate.estimate.labels_used)} "
        f"labels (surrogate version {gate.estimate.surrogate_version}).</p>"
    )


def _html(data: ReportData, panels: list[tuple[str, bytes]]) -> str:
    pool, est = data.pool, data.estimate
    esc = html.escape
    settings = [
        ("pool", pool.name),
        ("description", pool.description or "-"),
        ("task", enum_name("TaskType", pool.task)),
        ("loss", enum_name("LossKind", pool.loss)),
        ("items", _count(pool.item_count)),
        ("draws", _count(pool.draw_count)),
        ("labeled", _count(pool.labeled_count)),
        ("pending", _count(pool.pending_count)),
        ("skipped", _count(pool.skipped_count)),
        (
            "surrogate version",
            f"{pool.surrogate_version} (the estimates below used version {est.surrogate_version})",
        ),
        ("confidence", f"{est.confidence:.0%}"),
    ]
    if data.reference_risk is not None:
        settings.append((data.reference_label, _fmt(data.reference_risk)))
    parts = [
        "<!DOCTYPE html>",
        '<html lang="en"><head><meta charset="utf-8">',
        f"<title>leadline report: {esc(pool.name)}</title>",
        "<style>body{font-family:sans-serif;max-width:1100px;margin:2em auto;color:#222}"
        "table{border-collapse:collapse;margin:1em 0}td,th{border:1px solid #ccc;"
        "padding:3px 8px;text-align:left}img{max-width:100%}"
        ".verdict{font-size:1.3em;font-weight:bold}</style></head><body>",
        f"<h1>leadline report: {esc(pool.name)}</h1>",
        f"<p>Generated {esc(data.generated_at)}.</p>",
        "<table>"
        + "".join(f"<tr><th>{esc(k)}</th><td>{esc(v)}</td></tr>" for k, v in settings)
        + "</table>",
    ]
    if data.gate is not None:
        parts.append(_gate_html(data.gate))
    header = (
        f"<tr><th>scope</th><th>estimate</th><th>two-sided {est.confidence:.0%} fixed-time "
        f"interval</th><th>two-sided {est.confidence:.0%} anytime interval</th>"
        "<th>labels</th><th>items</th><th>mode</th><th>surrogate version</th></tr>"
    )
    rows = [_estimate_row("whole pool", est)]
    rows += [_estimate_row(name, seg) for name, seg in sorted(data.segments.items())]
    parts.append("<h2>Estimates</h2><table>" + header + "".join(rows) + "</table>")
    for title, png in panels:
        encoded = base64.b64encode(png).decode("ascii")
        parts.append(
            f'<h2>{esc(title)}</h2><img alt="{esc(title)}" src="data:image/png;base64,{encoded}">'
        )
    parts.append(
        "<h2>Reading this report</h2><p>The intervals in the table are two-sided: each "
        "covers the risk at the stated confidence. The fixed-time interval holds when looked "
        "at once; the anytime interval holds however often it is checked. A gate decides on "
        "one bound at a time, one-sided at its confidence (the risk lies above the upper "
        "bound with probability at most 1 - confidence), so its bounds are narrower than the "
        "two-sided interval at the same confidence; the gate line and the first panel show "
        "the bounds the gate used. All of them describe the items in this pool only: they "
        "say nothing about traffic that has not arrived, and they assume the labels are "
        "right.</p></body></html>"
    )
    return "\n".join(parts)


def write_report(data: ReportData, out_dir: str | Path, *, stem: str = "report") -> ReportFiles:
    """Write ``{stem}.png`` and ``{stem}.html`` into ``out_dir`` (created if missing)."""
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    combined, panels = render_report(data)
    files = ReportFiles(png=out / f"{stem}.png", html=out / f"{stem}.html")
    files.png.write_bytes(combined)
    files.html.write_text(_html(data, panels), encoding="utf-8")
    _LOG.info("report written to %s and %s", files.png, files.html)
    return files
