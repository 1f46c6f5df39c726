"""``leadline demo``: the whole loop against a real local server, in an invented scenario.

Brindlecove Couriers (a made-up parcel company) runs "parcel-fate", a model of its own
that predicts, from twelve scan features, whether a parcel arrives on time, late, or is
misrouted. This week's traffic differs from the training data (a covariate shift: more
parcels from the far end of one feature). Before shipping the model again, the release
policy asks: is its error rate on this week's traffic below 15%, at 95% confidence?

The demo trains the model itself on synthetic data (scikit-learn's make_classification),
keeping a validation split of the training traffic aside, starts a real ``leadline serve``
child on a free loopback port with a temporary data directory and token file, uploads the
model's validation split as validation items, streams the week's traffic in batches (the
monitoring job), plays the labeling vendor (answers come from the scenario's hidden
labels) in rounds, waits for the surrogate refit each round calls for (a person labels far
slower than a refit), polls the release gate after every round, writes the report, and
prints a summary. It then labels a second pool with the same traffic but no validation
items, so the summary can put the labels each needed beside what random sampling would
need. The true risk it prints is computed from the hidden labels of every pool item,
never from the estimator.
"""

from __future__ import annotations

import dataclasses
import json
import logging
import math
import secrets
import shutil
import statistics
import sys
import tempfile
import time
from dataclasses import dataclass
from pathlib import Path
from typing import TextIO

import numpy as np

from leadline.client._client import Client, Skip
from leadline.client._local_server import LocalServer
from leadline.client._results import GateResult, Verdict
from leadline.client.report import collect_report_data, write_report

__all__ = [
    "DemoSummary",
    "LabelingOutcome",
    "Scenario",
    "build_scenario",
    "iid_labels_for_half_width",
    "run_demo",
]

_LOG = logging.getLogger(__name__)

POOL_ID = "brindlecove-parcel-fate"
# The same week's traffic without validation items, for the comparison.
PLAIN_POOL_ID = "brindlecove-parcel-fate-plain"
CLASSES = ("on-time", "late", "misrouted")
DEPOTS = ("harbour-depot", "hill-depot", "river-depot")
MAX_RISK = 0.15
CONFIDENCE = 0.95
_TRAIN_ROWS = 4000
# Training-time traffic the model never trained on: its validation split.
_VALIDATION_ROWS = 2000
_FEATURES = 12
_BATCH_ROWS = 2000
_ROUND_LABELS = 20
# One parcel in a hundred has an unreadable scan: the vendor skips it.
_SKIP_RATE = 0.01
_DAY_MS = 24 * 3600 * 1000
# Longest wait for a due surrogate refit between labeling rounds.
_REFIT_WAIT_SECONDS = 30.0


@dataclass(frozen=True)
class Scenario:
    """The week's traffic with its hidden truth. Arrays are row-aligned."""

    item_ids: list[str]
    features: np.ndarray  # (n, 12) float32
    probabilities: np.ndarray  # (n, 3) the model's outputs
    hidden_labels: np.ndarray  # (n,) true classes: only the simulated vendor may look
    segments: list[str]
    event_time_ms: np.ndarray
    train_seconds: float
    # The model's validation split: training-time traffic it did not train on, with the
    # model's (held-out) outputs and the true labels, as a team keeps it.
    validation_features: np.ndarray
    validation_probabilities: np.ndarray
    validation_labels: np.ndarray

    @property
    def true_risk(self) -> float:
        """Zero-one risk of the model over the whole pool, from the hidden labels."""
        predicted = self.probabilities.argmax(axis=1)
        return float(np.mean(predicted != self.hidden_labels))

    def true_segment_risks(self) -> dict[str, float]:
        """Zero-one risk per segment, from the hidden labels."""
        wrong = self.probabilities.argmax(axis=1) != self.hidden_labels
        segments = np.asarray(self.segments)
        return {name: float(wrong[segments == name].mean()) for name in sorted(set(self.segments))}


@dataclass(frozen=True)
class LabelingOutcome:
    """How one pool's labeling went: labels spent until the gate decided (or the budget
    ran out), the interval reached, and what random sampling would need for it."""

    labels_used: int
    labels_skipped: int
    half_width: float  # of the fixed-time interval
    iid_labels_same_width: int | None
    verdict: str
    gate_polls: int
    surrogate_version: int
    labeling_seconds: float


@dataclass(frozen=True)
class DemoSummary:
    """What the demo prints at the end (also written as summary.json beside the report)."""

    items: int
    true_risk: float  # from the hidden labels, not from the estimator
    estimate: float
    lower: float  # two-sided interval at confidence (GetEstimate)
    upper: float
    anytime_lower: float
    anytime_upper: float
    confidence: float
    mode: str
    labels_used: int
    labels_skipped: int
    iid_labels_same_width: int | None
    max_risk: float
    verdict: str
    gate_polls: int
    gate_reason: str
    gate_bound: str  # the bound kind the gate decided on
    gate_lower: float  # the gate's bounds, each one-sided at confidence
    gate_upper: float
    labeling_seconds: float
    report_png: str
    report_html: str
    validation_items: int = 0
    surrogate_version: int = 0
    # The same traffic labeled without validation items (None if it was not run).
    without_validation: LabelingOutcome | None = None
    wall_seconds: float = 0.0


def build_scenario(*, seed: int, items: int) -> Scenario:
    """Synthetic training data and a shifted pool of ``items`` rows; trains the model.

    Deterministic for a given seed (the tests rebuild it to check the printed true risk).
    """
    from sklearn.datasets import make_classification
    from sklearn.ensemble import HistGradientBoostingClassifier
    from threadpoolctl import threadpool_limits  # installed with scikit-learn

    if items < 100:
        raise ValueError(f"items = {items}: must be >= 100.")
    rows = int(2.6 * (items + _TRAIN_ROWS))
    x, y = make_classification(
        n_samples=rows,
        n_features=_FEATURES,
        n_informative=6,
        n_redundant=2,
        n_classes=len(CLASSES),
        n_clusters_per_class=2,
        class_sep=1.2,
        flip_y=0.02,
        random_state=seed,
    )
    rng = np.random.default_rng(seed)
    # Covariate shift: rows with a large first feature are likelier to be this week's
    # traffic than training data. Labels given features are unchanged.
    in_pool = rng.random(rows) < 1.0 / (1.0 + np.exp(-1.2 * x[:, 0]))
    outside = np.flatnonzero(~in_pool)
    train = outside[:_TRAIN_ROWS]
    # Up to _VALIDATION_ROWS of the training-time rows left over (fewer for tiny pools).
    validation = outside[_TRAIN_ROWS : _TRAIN_ROWS + _VALIDATION_ROWS]
    pool = np.flatnonzero(in_pool)[:items]
    if len(pool) < items:
        raise ValueError(f"scenario produced {len(pool)} pool rows, fewer than items={items}.")
    started = time.perf_counter()
    model = HistGradientBoostingClassifier(max_iter=60, random_state=seed)
    # One OpenMP thread: on a busy 2-core machine more threads spin against each other
    # (measured: 56 s instead of 1 s while a server and tests shared the cores).
    with threadpool_limits(limits=1):
        model.fit(x[train], y[train])
        probabilities = _normalised(model.predict_proba(x[pool]))
        validation_probabilities = _normalised(model.predict_proba(x[validation]))
    train_seconds = time.perf_counter() - started
    cuts = np.quantile(x[train, 3], [1 / 3, 2 / 3])
    depot = np.digitize(x[pool, 3], cuts)
    times = np.sort(rng.integers(0, _DAY_MS, size=items)) + 1_790_000_000_000
    return Scenario(
        item_ids=[f"parcel-{i:07d}" for i in range(items)],
        features=x[pool].astype(np.float32),
        probabilities=probabilities,
        hidden_labels=y[pool].astype(np.int64),
        segments=[DEPOTS[d] for d in depot],
        event_time_ms=times.astype(np.int64),
        train_seconds=train_seconds,
        validation_features=x[validation].astype(np.float32),
        validation_probabilities=validation_probabilities,
        validation_labels=y[validation].astype(np.int64),
    )


def _normalised(probabilities: np.ndarray) -> np.ndarray:
    # float32 rounding can leave a row summing to 1 +- 1e-7: renormalise in float64 first.
    wide = np.asarray(probabilities, dtype=np.float64)
    return np.asarray((wide / wide.sum(axis=1, keepdims=True)).astype(np.float32))


def iid_labels_for_half_width(
    risk: float, half_width: float, *, confidence: float, population: int
) -> int:
    """Labels a simple random sample needs for a normal-approximation interval of
    half-width ``half_width`` on a 0/1 loss with mean ``risk``.

    n0 = z^2 p (1 - p) / h^2 with z the two-sided normal quantile, then the finite
    population correction n = n0 / (1 + (n0 - 1) / N) (the standard sample-size formula
    for a proportion, as in the textbook "Sampling Techniques", 3rd ed., 1977).
    """
    if not half_width > 0:
        raise ValueError(f"half_width = {half_width}: must be > 0.")
    z = statistics.NormalDist().inv_cdf(0.5 + confidence / 2)
    n0 = z * z * risk * (1 - risk) / (half_width * half_width)
    return math.ceil(n0 / (1 + (n0 - 1) / population))


class _Progress:
    """A progress bar plus a live estimate line; rewrites one line on a terminal."""

    def __init__(self, stream: TextIO, budget: int) -> None:
        self.stream = stream
        self.budget = budget
        self.live = stream.isatty()
        self.last_print = 0.0

    def update(self, labels: int, result: GateResult, *, final: bool = False) -> None:
        filled = int(16 * min(labels, self.budget) / self.budget)
        bar = "#" * filled + "." * (16 - filled)
        # Short enough for an 80-column terminal: a wrapped line cannot be rewritten. The
        # bound shown is the one-sided upper bound the gate compares with the threshold.
        line = (
            f"[{bar}] {labels:4d}/{self.budget} | est {result.estimate.risk:.4f} | upper "
            f"{result.upper:.4f} vs {result.max_risk:g} | {str(result.verdict).upper()}"
        )
        if self.live:
            # \r returns to the line start, ESC[K clears what a longer line left behind.
            self.stream.write("\r\x1b[K" + line + ("\n" if final else ""))
            self.stream.flush()
        elif final or time.monotonic() - self.last_print > 2.0:
            self.stream.write(line + "\n")
            self.stream.flush()
            self.last_print = time.monotonic()


def _say(stream: TextIO, text: str = "") -> None:
    stream.write(text + "\n")
    stream.flush()


def run_demo(
    *,
    out_dir: str | Path = Path("reports") / "demo",
    seed: int = 7,
    items: int = 20_000,
    budget: int = 800,
    stream: TextIO | None = None,
) -> int:
    """Run the demo end to end; 0 when it ran through (whatever the gate said)."""
    out = stream or sys.stdout
    wall_start = time.perf_counter()
    _say(out, "leadline demo: Brindlecove Couriers (invented) checks its 'parcel-fate' model")
    _say(
        out,
        f"  release policy: error rate below {MAX_RISK:.0%} at {CONFIDENCE:.0%} "
        "confidence on this week's traffic",
    )
    scenario = build_scenario(seed=seed, items=items)
    _say(
        out,
        f"  trained the model (gradient-boosted trees, {_TRAIN_ROWS:,} rows) in "
        f"{scenario.train_seconds:.1f} s; this week's traffic: {items:,} parcels",
    )
    tokens = {name: secrets.token_urlsafe(24) for name in ("admin", "ingest", "labeler", "reader")}
    with tempfile.TemporaryDirectory(prefix="leadline-demo-") as workdir:
        server = LocalServer(
            workdir,
            tokens={token: [role] for role, token in tokens.items()},
            # Same seed, same draws (refits run in the background, so their timing can
            # still change which surrogate a draw used).
            extra_args=["--draw-seed", str(seed)],
        )
        started = time.perf_counter()
        target = server.start()
        try:
            _say(
                out,
                f"  started leadline serve on {target} in "
                f"{time.perf_counter() - started:.1f} s (data dir {server.data_dir})",
            )
            summary = _run_loop(
                out, target, tokens, scenario, budget=budget, out_dir=out_dir, seed=seed
            )
        finally:
            code = server.stop()
            _LOG.info("server stopped with exit code %s", code)
            # Keep the server's log beside the report: the temporary folder goes away.
            Path(out_dir).mkdir(parents=True, exist_ok=True)
            shutil.copyfile(server.log_path, Path(out_dir) / "server.log")
    summary = dataclasses.replace(summary, wall_seconds=round(time.perf_counter() - wall_start, 2))
    _print_summary(out, summary)
    summary_path = Path(out_dir) / "summary.json"
    summary_path.write_text(
        json.dumps(dataclasses.asdict(summary), indent=2) + "\n", encoding="utf-8"
    )
    return 0


def _run_loop(
    out: TextIO,
    target: str,
    tokens: dict[str, str],
    scenario: Scenario,
    *,
    budget: int,
    out_dir: str | Path,
    seed: int,
) -> DemoSummary:
    admin = Client(target, token=tokens["admin"])
    monitor = Client(target, token=tokens["ingest"])
    vendor = Client(target, token=tokens["labeler"])
    gate = Client(target, token=tokens["reader"])
    try:
        for pool, description in (
            (POOL_ID, "this week's traffic, taught by the validation split"),
            (PLAIN_POOL_ID, "this week's traffic, no validation items (comparison)"),
        ):
            admin.create_pool(
                pool,
                task="classification",
                num_classes=len(CLASSES),
                feature_dim=_FEATURES,
                loss="zero-one",
                description=f"Brindlecove parcel-fate model, {description} (invented)",
            )
        started = time.perf_counter()
        uploaded = monitor.add_validation(
            POOL_ID,
            [f"validation-{i:05d}" for i in range(len(scenario.validation_labels))],
            scenario.validation_features,
            scenario.validation_probabilities,
            scenario.validation_labels,
        )
        _say(
            out,
            f"  uploaded the model's validation split ({uploaded.accepted:,} labeled parcels "
            f"of training-time traffic) as validation items in "
            f"{time.perf_counter() - started:.1f} s: they teach the surrogate, never the estimate",
        )
        started = time.perf_counter()
        n = len(scenario.item_ids)
        for pool in (POOL_ID, PLAIN_POOL_ID):
            for start in range(0, n, _BATCH_ROWS):
                rows = slice(start, start + _BATCH_ROWS)
                monitor.ingest(
                    pool,
                    scenario.item_ids[rows],
                    scenario.features[rows],
                    scenario.probabilities[rows],
                    segments=scenario.segments[rows],
                    event_time_ms=scenario.event_time_ms[rows],
                    payload_refs=[f"scan-archive/{i}.json" for i in scenario.item_ids[rows]],
                )
        seconds = time.perf_counter() - started
        _say(
            out,
            f"  monitoring job streamed {n:,} items in {math.ceil(n / _BATCH_ROWS)} "
            f"batches to each of two pools in {seconds:.1f} s ({2 * n / seconds:,.0f} items/s)",
        )
        _say(
            out,
            f"  labeling vendor works in rounds of {_ROUND_LABELS} and waits for the surrogate "
            "refit each round calls for; the release gate is polled after every round "
            "(anytime bound: safe to poll)",
        )
        _say(
            out,
            f"  live: labels spent/budget | estimate | the gate's one-sided {CONFIDENCE:.0%} "
            "anytime upper bound vs the threshold | verdict",
        )
        taught, result = _label_until_decided(
            out, vendor, gate, scenario, POOL_ID, budget=budget, seed=seed, show=True
        )
        _say(out, "  the same traffic without validation items (second pool):")
        plain, _ = _label_until_decided(
            out, vendor, gate, scenario, PLAIN_POOL_ID, budget=budget, seed=seed, show=True
        )
        estimate = gate.get_estimate(POOL_ID, confidence=CONFIDENCE)
        info = gate.get_pool(POOL_ID)
        data = collect_report_data(
            gate,
            POOL_ID,
            confidence=CONFIDENCE,
            max_risk=MAX_RISK,
            bound="anytime",
            reference_risk=scenario.true_risk,
            reference_label="true risk (hidden labels)",
            reference_segment_risks=scenario.true_segment_risks(),
        )
        files = write_report(data, out_dir, stem=POOL_ID)
    finally:
        for client in (admin, monitor, vendor, gate):
            client.close()
    return DemoSummary(
        items=len(scenario.item_ids),
        true_risk=scenario.true_risk,
        estimate=estimate.risk,
        lower=estimate.lower,
        upper=estimate.upper,
        anytime_lower=estimate.anytime_lower,
        anytime_upper=estimate.anytime_upper,
        confidence=estimate.confidence,
        mode=str(estimate.mode),
        labels_used=int(estimate.labels_used),
        labels_skipped=int(estimate.labels_skipped),
        iid_labels_same_width=taught.iid_labels_same_width,
        max_risk=MAX_RISK,
        verdict=taught.verdict,
        gate_polls=taught.gate_polls,
        gate_reason=result.reason,
        gate_bound=str(result.bound),
        gate_lower=result.lower,
        gate_upper=result.upper,
        labeling_seconds=taught.labeling_seconds,
        report_png=str(files.png),
        report_html=str(files.html),
        validation_items=int(info.validation_count),
        surrogate_version=int(info.surrogate_version),
        without_validation=plain,
    )


def _label_until_decided(
    out: TextIO,
    vendor: Client,
    gate: Client,
    scenario: Scenario,
    pool: str,
    *,
    budget: int,
    seed: int,
    show: bool,
) -> tuple[LabelingOutcome, GateResult]:
    """Label in rounds until the gate decides or the budget is spent; after each round
    wait for the refit it calls for, then poll the gate."""
    index = {item_id: i for i, item_id in enumerate(scenario.item_ids)}
    rng = np.random.default_rng(seed + 1)
    progress = _Progress(out, budget) if show else None
    labels = skipped = polls = 0
    started = time.perf_counter()
    while True:
        assignments = vendor.acquire(pool, _ROUND_LABELS, labeler="brindlecove-vendor")
        answers: dict[str, int | Skip] = {}
        for assignment in assignments:
            if rng.random() < _SKIP_RATE:
                answers[assignment.assignment_id] = Skip("scan image unreadable")
                skipped += 1
            else:
                answers[assignment.assignment_id] = int(
                    scenario.hidden_labels[index[assignment.item_id]]
                )
                labels += 1
        if answers:
            vendor.submit_labels(pool, answers, labeler="brindlecove-vendor")
            _wait_for_refit(gate, pool)
        result = gate.check_gate(pool, max_risk=MAX_RISK, confidence=CONFIDENCE, bound="anytime")
        polls += 1
        done = result.verdict is not Verdict.UNDECIDED or labels >= budget or not assignments
        if progress is not None:
            progress.update(labels, result, final=done)
        if done:
            break
    seconds = time.perf_counter() - started
    estimate = gate.get_estimate(pool, confidence=CONFIDENCE)
    half = (estimate.upper - estimate.lower) / 2
    outcome = LabelingOutcome(
        labels_used=int(estimate.labels_used),
        labels_skipped=int(estimate.labels_skipped),
        half_width=half,
        iid_labels_same_width=iid_labels_for_half_width(
            scenario.true_risk,
            half,
            confidence=estimate.confidence,
            population=len(scenario.item_ids),
        )
        if half > 0
        else None,
        verdict=str(result.verdict).upper(),
        gate_polls=polls,
        surrogate_version=int(gate.get_pool(pool).surrogate_version),
        labeling_seconds=round(seconds, 2),
    )
    return outcome, result


def _wait_for_refit(client: Client, pool: str) -> None:
    """Wait until the surrogate covers every label so far (a refit is due after every round
    of 20; the server's default cadence is 10 labels), at most _REFIT_WAIT_SECONDS."""
    deadline = time.monotonic() + _REFIT_WAIT_SECONDS
    while time.monotonic() < deadline:
        info = client.get_pool(pool)
        if info.surrogate_label_count >= info.labeled_count:
            return
        time.sleep(0.05)
    _LOG.warning("pool %s: no refit within %s s; labeling on", pool, _REFIT_WAIT_SECONDS)


def _print_summary(out: TextIO, s: DemoSummary) -> None:
    half = (s.upper - s.lower) / 2
    covered = "yes" if s.lower <= s.true_risk <= s.upper else "NO"
    _say(out)
    _say(out, "Summary")
    _say(out, f"  true risk (hidden labels of all {s.items:,} items): {s.true_risk:.4f}")
    _say(
        out,
        f"  leadline estimate ({s.mode}): {s.estimate:.4f} ± {half:.4f}  ({s.confidence:.0%} "
        f"two-sided: fixed-time [{s.lower:.4f}, {s.upper:.4f}]; anytime "
        f"[{s.anytime_lower:.4f}, {s.anytime_upper:.4f}])",
    )
    _say(out, f"  true risk inside the fixed-time interval: {covered}")
    _say(
        out,
        f"  labels used: {s.labels_used} (plus {s.labels_skipped} skipped), surrogate version "
        f"{s.surrogate_version} taught by {s.validation_items:,} validation items",
    )
    if s.iid_labels_same_width is not None:
        _say(
            out,
            f"  random sampling would need about {s.iid_labels_same_width:,} labels for the "
            f"same ± {half:.4f}",
        )
    plain = s.without_validation
    if plain is not None:
        needed = (
            f"random sampling would need about {plain.iid_labels_same_width:,} for the same "
            f"± {plain.half_width:.4f}"
            if plain.iid_labels_same_width is not None
            else "no interval to compare"
        )
        _say(
            out,
            f"  without validation items: {plain.labels_used} labels used (gate "
            f"{plain.verdict}, surrogate version {plain.surrogate_version}); {needed}",
        )
        _say(out, "    (one run of random draws per pool: expect the counts to vary run to run)")
    _say(
        out,
        "    (random sampling: n0 = z^2 p(1-p) / h^2 with p the true risk, h the half-width, "
        "z the normal quantile; n = n0 / (1 + (n0-1)/N): the textbook sample-size formula "
        "for a proportion)",
    )
    level = f"one-sided {s.confidence:.0%} {s.gate_bound}"
    if s.verdict == "PASS":
        rests = f"{level} upper bound {s.gate_upper:.4f} < {s.max_risk:g}"
    elif s.verdict == "FAIL":
        rests = f"{level} lower bound {s.gate_lower:.4f} > {s.max_risk:g}"
    else:
        rests = (
            f"{level} bounds [{s.gate_lower:.4f}, {s.gate_upper:.4f}] on both sides of "
            f"{s.max_risk:g}"
        )
    _say(
        out,
        f"  gate: {s.verdict} (risk below {s.max_risk:g} at {s.confidence:.0%}, after "
        f"{s.gate_polls} polls): {rests}",
    )
    _say(out, "    (a gate decides on one-sided bounds: narrower than the two-sided interval)")
    _say(out, f"  report: {s.report_png}")
    _say(out, f"          {s.report_html}")
    _say(out, f"  wall time: {s.wall_seconds:.1f} s")
