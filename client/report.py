"""A pool's report: one PNG with three panels and a self-contained HTML page.

Panels:
1. estimate and its bounds against the labels used (from GetEstimateTrace);
2. per-segment estimates with their bounds (GetEstimate for each of Pool.segments);
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
from leadline.v1 import leadline_pb2

__all__ = ["ReportData", "ReportFiles", "collect_report_data", "render_report", "write_report"]

_LOG = logging.getLogger(__name__)
_PANEL_SIZE = (6.4, 4.2)


@dataclass(frozen=True)
class ReportData:
    """Everything a report shows, fetched once (see :func:`collect_report_data`)."""

    pool: leadline_pb2.Pool
    estimate: leadline_pb2.Estimate
    trace: list[leadline_pb2.Estimate]
    segments: dict[str, leadline_pb2.Estimate]
    draws: list[leadline_pb2.Draw]
    gate: leadline_pb2.GateResult | None = None
    max_risk: float | None = None
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
    if max_risk is not None:
        gate = client.check_gate(pool, max_risk=max_risk, confidence=confidence, bound=bound)
    return ReportData(
        pool=info,
        estimate=estimate,
        trace=trace,
        segments=segments,
        draws=draws,
        gate=gate,
        max_risk=max_risk,
        reference_risk=reference_risk,
        reference_label=reference_label,
        reference_segment_risks=dict(reference_segment_risks or {}),
    )


# -- panels ---------------------------------------------------------------------------------


def _draw_trace(ax: Axes, data: ReportData) -> None:
    trace = data.trace
    confidence = data.estimate.confidence or (trace[-1].confidence if trace else 0.0)
    if trace:
        labels = np.array([point.labels_used for point in trace])
        risk = np.array([point.risk for point in trace])
        ax.fill_between(
            labels,
            [p.lower for p in trace],
            [p.upper for p in trace],
            alpha=0.3,
            color="tab:blue",
            label=f"fixed-time interval ({confidence:.0%})",
        )
        ax.plot(labels, [p.anytime_lower for p in trace], "--", color="tab:purple", lw=1)
        ax.plot(
            labels,
            [p.anytime_upper for p in trace],
            "--",
            color="tab:purple",
            lw=1,
            label=f"anytime bound ({confidence:.0%})",
        )
        ax.plot(labels, risk, "o-", color="tab:blue", ms=3, label="estimate")
    else:
        ax.text(0.5, 0.5, "no labels yet", ha="center", va="center", transform=ax.transAxes)
    _reference_lines(ax, data, horizontal=True)
    ax.set_xlabel("labels used")
    ax.set_ylabel("risk (mean loss)")
    ax.set_title("Estimate and bounds vs labels used")
    ax.legend(fontsize=7, loc="upper right")
    ax.grid(alpha=0.3)


def _reference_lines(ax: Axes, data: ReportData, *, horizontal: bool) -> None:
    line = ax.axhline if horizontal else ax.axvline
    if data.max_risk is not None:
        line(data.max_risk, color="tab:red", lw=1.2, label=f"gate threshold {data.max_risk:g}")
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
        ax.annotate(
            f"{est.labels_used} labels",
            (est.upper, position),
            xytext=(4, 3),
            textcoords="offset points",
            fontsize=7,
        )
    ax.set_yticks(y, [name for name, _ in rows], fontsize=8)
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
    ax.set_xlabel("risk: estimate, fixed-time interval (thick), anytime bound (thin)")
    ax.set_title("Per-segment estimates")
    ax.grid(alpha=0.3, axis="x")
    if data.max_risk is not None or data.reference_risk is not None or marked:
        ax.legend(fontsize=7, loc="lower right")


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
        ax.legend(fontsize=7)
    ax.set_xlabel("surrogate's expected loss of the drawn item")
    ax.set_ylabel("selection probability x remaining items")
    ax.set_title("Which items were drawn, and how likely")
    ax.grid(alpha=0.3)


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
    return f"{value:.4f}"


def _estimate_row(name: str, est: leadline_pb2.Estimate) -> str:
    cells = [
        name,
        _fmt(est.risk),
        f"[{_fmt(est.lower)}, {_fmt(est.upper)}]",
        f"[{_fmt(est.anytime_lower)}, {_fmt(est.anytime_upper)}]",
        str(est.labels_used),
        str(est.items_in_scope),
        enum_name("EstimatorMode", est.mode),
    ]
    return "<tr>" + "".join(f"<td>{html.escape(c)}</td>" for c in cells) + "</tr>"


def _html(data: ReportData, panels: list[tuple[str, bytes]]) -> str:
    pool, est = data.pool, data.estimate
    esc = html.escape
    settings = [
        ("pool", pool.name),
        ("description", pool.description or "-"),
        ("task", enum_name("TaskType", pool.task)),
        ("loss", enum_name("LossKind", pool.loss)),
        ("items", f"{pool.item_count:,}"),
        ("draws", f"{pool.draw_count:,}"),
        ("labeled", f"{pool.labeled_count:,}"),
        ("pending", f"{pool.pending_count:,}"),
        ("skipped", f"{pool.skipped_count:,}"),
        ("surrogate version", str(pool.surrogate_version)),
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
        verdict = enum_name("Verdict", data.gate.verdict).upper()
        parts.append(
            f'<p class="verdict">Gate: {esc(verdict)} (risk below {data.max_risk:g}, '
            f"{esc(enum_name('BoundKind', data.gate.bound))} bound)</p>"
            f"<p>{esc(data.gate.reason)}</p>"
        )
    header = (
        "<tr><th>scope</th><th>estimate</th><th>fixed-time interval</th>"
        "<th>anytime bound</th><th>labels</th><th>items</th><th>mode</th></tr>"
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
        "<h2>Reading this report</h2><p>The fixed-time interval holds at the stated "
        "confidence when looked at once; the anytime bound holds however often it is "
        "checked, so it is the one to poll. Both describe the items in this pool only: "
        "they say nothing about traffic that has not arrived, and they assume the labels "
        "are right.</p></body></html>"
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
