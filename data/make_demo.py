# INVENTED DATA: every shop, number and promotion this script writes is made up for the
# castgrid demo. "Tallow & Rye" is an invented bakery chain; nothing here describes a real
# business or real sales.
"""Write ``data/demo_shops.csv``: invented monthly unit sales of an invented bakery chain.

The scenario is invented for the castgrid demo: "Tallow & Rye", a chain of 30 bakery shops
(``TR-01`` ... ``TR-30``), sells loaves and pastries; the file holds each shop's units sold per
month over eight years (96 months, January 2017 to December 2024) in long layout::

    shop,month,units,promo
    TR-01,2017-01-01,874,0

* ``units``: a shop's level times a slow trend times a yearly pattern (a December peak, a
  spring bump, a summer dip), times noise, times a lift in promotion months; rounded to whole
  units and always positive.
* ``promo``: 1 in months with a (made-up) promotion, else 0; known in advance, so it can be
  used as a covariate.
* Two shops change level for good: TR-07 loses trade from April 2020 (invented roadworks
  outside), TR-19 gains from September 2021 (an invented refit with café seats).

The numbers come from ``numpy.random.default_rng(SEED)`` and are written with fixed
formatting, so running ``python data/make_demo.py`` rewrites the file byte for byte;
``--check`` only compares and exits 1 when the file differs.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

import numpy as np

SEED = 20170101
N_SHOPS = 30
N_MONTHS = 96
START_YEAR = 2017
OUT = Path(__file__).with_name("demo_shops.csv")

#: Yearly pattern by calendar month (multiplicative), Jan..Dec: a December peak, a spring
#: bump, a summer dip. Invented.
SEASON_SHAPE = np.array([0.92, 0.90, 0.98, 1.06, 1.02, 0.97, 0.90, 0.86, 0.98, 1.03, 1.08, 1.30])
#: (shop index, first month index, factor): lasting level shifts. Invented.
LEVEL_SHIFTS = ((6, 39, 0.70), (18, 56, 1.25))


def generate(seed: int = SEED) -> list[tuple[str, str, int, int]]:
    """Rows (shop, month, units, promo), sorted by shop then month."""
    rng = np.random.default_rng(seed)
    months = np.arange(N_MONTHS)
    calendar = months % 12
    level = rng.uniform(350.0, 1400.0, N_SHOPS)
    growth = rng.normal(0.003, 0.002, N_SHOPS)  # per month, multiplicative
    amplitude = rng.uniform(0.6, 1.4, N_SHOPS)  # how strongly each shop follows the pattern
    lift = rng.uniform(1.10, 1.25, N_SHOPS)
    noise = rng.normal(0.0, 0.06, (N_SHOPS, N_MONTHS))
    # Promotions are likelier in autumn, when the chain launches its seasonal range.
    promo_p = np.where(np.isin(calendar, [9, 10]), 0.35, 0.10)
    promo = (rng.random((N_SHOPS, N_MONTHS)) < promo_p).astype(int)

    season = 1.0 + amplitude[:, None] * (SEASON_SHAPE[calendar][None, :] - 1.0)
    trend = np.exp(growth[:, None] * months[None, :])
    shift = np.ones((N_SHOPS, N_MONTHS))
    for shop, first, factor in LEVEL_SHIFTS:
        shift[shop, first:] = factor
    units = level[:, None] * trend * season * shift * np.exp(noise)
    units *= np.where(promo == 1, lift[:, None], 1.0)
    units = np.maximum(np.rint(units), 1).astype(int)

    labels = [f"{START_YEAR + m // 12:04d}-{m % 12 + 1:02d}-01" for m in months]
    return [
        (f"TR-{s + 1:02d}", labels[m], int(units[s, m]), int(promo[s, m]))
        for s in range(N_SHOPS)
        for m in range(N_MONTHS)
    ]


def render(rows: list[tuple[str, str, int, int]]) -> bytes:
    """The CSV text: a header, one line per row, ``\\n`` line ends, UTF-8."""
    lines = ["shop,month,units,promo"] + [f"{s},{m},{u:d},{p:d}" for s, m, u, p in rows]
    return ("\n".join(lines) + "\n").encode("utf-8")


def main(argv: list[str] | None = None) -> int:
    """Write (or with ``--check`` compare) the demo file; returns the exit code."""
    parser = argparse.ArgumentParser(description="Write the invented Tallow & Rye demo data.")
    parser.add_argument("--out", type=Path, default=OUT, help="where to write the CSV")
    parser.add_argument("--check", action="store_true", help="compare only; exit 1 on change")
    args = parser.parse_args(argv)
    content = render(generate())
    if args.check:
        same = args.out.exists() and args.out.read_bytes() == content
        print(f"{args.out}: {'up to date' if same else 'differs from the generator'}")
        return 0 if same else 1
    tmp = args.out.with_suffix(".csv.tmp")
    tmp.write_bytes(content)
    tmp.replace(args.out)  # never leave a half-written file behind
    print(f"{args.out}: {len(content):,} bytes, {N_SHOPS} shops x {N_MONTHS} months")
    return 0


if __name__ == "__main__":
    sys.exit(main())
