"""Benchmark: drawing a field chart of many stars, the service's renderer vs plain matplotlib.

Run from the repository root::

    PYTHONPATH=. python -m benchmarks.bench_charts [--stars 2000] [--repeat 2]

Both draw the same stars (random, over the whole sky, moved over 10,000 years) on two
Hammer panels with a motion arrow per star, as SVG and as PNG, in one process:

1. :func:`service.charts.render_field`, which draws each panel's arrows as one artist
   (outlines made in display space when drawn) and leaves the markers unclipped;
2. the plain matplotlib route a user would write first: ``Axes.annotate`` with an arrow per
   star and panel, and ``Axes.scatter`` markers clipped to the sky's outline. It draws
   less than the chart (no labels, ticks or notes), so the ratio errs low.

The ratios printed are baseline CPU time / renderer CPU time (best of ``--repeat`` runs).
"""

from __future__ import annotations

import argparse
import io
import math
import time

import numpy as np

from service import charts


def make_chart(n: int, seed: int = 20261204) -> charts.FieldChart:
    rng = np.random.default_rng(seed)
    return charts.star_field(
        rng.uniform(0.0, 360.0, n),
        np.degrees(np.arcsin(rng.uniform(-1.0, 1.0, n))),
        rng.uniform(1.0, 200.0, n),
        rng.normal(0.0, 300.0, n),
        rng.normal(0.0, 300.0, n),
        rng.normal(0.0, 30.0, n),
        catalogue_epoch_jyear=2016.0,
        epochs_jyear=(2016.0, 12016.0),
    )


def render_plain(chart: charts.FieldChart, image_format: str) -> bytes:
    """The chart's stars and arrows drawn one annotation per arrow (the baseline)."""
    from matplotlib.figure import Figure

    fig = Figure(figsize=charts.FIELD_SIZE_IN, layout="constrained")
    for k in range(2):
        ax = fig.add_subplot(1, 2, k + 1, projection="hammer")
        x, xe = charts._hammer_x(chart.ra_deg[k]), charts._hammer_x(chart.arrow_ra_deg[k])
        y, ye = np.radians(chart.dec_deg[k]), np.radians(chart.arrow_dec_deg[k])
        for i in range(x.size):
            if abs(xe[i] - x[i]) > math.pi:
                continue  # over the edge: the baseline leaves it out
            if math.hypot((xe[i] - x[i]) * math.cos(y[i]), ye[i] - y[i]) < charts.MIN_ARROW_RAD:
                continue
            ax.annotate(
                "",
                xy=(xe[i], ye[i]),
                xytext=(x[i], y[i]),
                arrowprops={
                    "arrowstyle": "-|>",
                    "lw": 0.9,
                    "shrinkA": 0,
                    "shrinkB": 0,
                    "mutation_scale": 7,
                },
            )
        ax.scatter(x, y, s=20.0, zorder=3)
    buf = io.BytesIO()
    fig.savefig(buf, format=image_format, dpi=charts.PNG_DPI)
    return buf.getvalue()


def render(chart: charts.FieldChart, image_format: str) -> bytes:
    """The chart as the service draws it."""
    return charts.render_field(chart, image_format=image_format)


def _best_cpu(fn, repeat: int) -> float:
    best = math.inf
    for _ in range(repeat):
        t = time.process_time()
        fn()
        best = min(best, time.process_time() - t)
    return best


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n", 1)[0])
    parser.add_argument("--stars", type=int, default=2000)
    parser.add_argument("--repeat", type=int, default=2)
    args = parser.parse_args(argv)
    charts.load_renderer()
    chart = make_chart(args.stars)
    print(f"field chart, {args.stars:,} stars, two panels (CPU seconds, best of {args.repeat})")
    for image_format in charts.IMAGE_FORMATS:
        ours = _best_cpu(lambda f=image_format: render(chart, f), args.repeat)
        plain = _best_cpu(lambda f=image_format: render_plain(chart, f), args.repeat)
        print(
            f"  {image_format}: renderer {ours:.2f} s, one annotation per arrow {plain:.2f} s, "
            f"ratio {plain / ours:.1f}x"
        )


if __name__ == "__main__":
    main()
