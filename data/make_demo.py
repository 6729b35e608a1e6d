# INVENTED DATA: every shop, number and promotion this script writes is made up for the
# castgrid demo. "Tallow & Rye" is an invented bakery chain; nothing here describes a real
# business or real sales.
"""Write ``data/demo_shops.csv``: invented monthly unit sales of an invented bakery chain.

The scenario is invented for the castgrid demo: "Tallow & Rye", a chain of 30 bakery shops
(``TR-01`` ... ``TR-30``), 6 station kiosks (``TR-31`` ... ``TR-36``) and 6 pop-up market
stalls (``TR-37`` ... ``TR-42``), sells loaves and pastries; the file holds each outlet's units
sold per month over eight years (96 months, January 2017 to December 2024) in long layout::

    shop,month,units,promo,format
    TR-01,2017-01-01,874,0,bakery

* ``units``: a shop's level times a slow trend times a yearly pattern (a December peak, a
  spring bump, a summer dip), times noise, times a lift in promotion months; rounded to whole
  units and always positive.
* ``promo``: 1 in months with a (made-up) promotion, else 0; known in advance, so it can be
  used as a covariate. Kiosks and stalls take no part in promotions (always 0).
* Two shops change level for good: TR-07 loses trade from April 2020 (invented roadworks
  outside), TR-19 gains from September 2021 (an invented refit with café seats).
* ``format``: what kind of outlet it is, the same in every row of an outlet (a series
  attribute): ``bakery`` (a high-street shop), ``cafe`` (a shop with seats), ``kiosk`` or
  ``stall``.
* A kiosk sells, each month, what it sold in the same month a year before times a lasting
  change (commuter numbers and timetables shift month by month, and the shift stays): a
  seasonal random walk in logarithms, for which last year's value, the seasonal naive
  forecast, is the best forecast there is. On the kiosks no model should beat it.
* The stalls trade only in the months they open: a stall opens in a month with a chance of its
  own (between 25% and 45%; 90% in December, for the Christmas markets) and then sells a
  lognormal number of units around its own typical size, with a spread of its own; in other
  months it sells 0. Their demand is intermittent or lumpy, unlike the shops'.
* Kiosks and stalls are drawn from a second random stream, so the shops' numbers are the same
  as before they were added.

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
N_KIOSKS = 6
N_STALLS = 6
N_MONTHS = 96
START_YEAR = 2017
OUT = Path(__file__).with_name("demo_shops.csv")

#: Yearly pattern by calendar month (multiplicative), Jan..Dec: a December peak, a spring
#: bump, a summer dip. Invented.
SEASON_SHAPE = np.array([0.92, 0.90, 0.98, 1.06, 1.02, 0.97, 0.90, 0.86, 0.98, 1.03, 1.08, 1.30])
#: (shop index, first month index, factor): lasting level shifts. Invented.
LEVEL_SHIFTS = ((6, 39, 0.70), (18, 56, 1.25))
#: Shop numbers of the shops with café seats (TR-19 since its refit); the other shops are
#: bakeries. Invented.
CAFES = (4, 10, 15, 19, 25, 28)


def shop_format(number: int) -> str:
    """The ``format`` of outlet ``TR-<number>``."""
    if number > N_SHOPS + N_KIOSKS:
        return "stall"
    if number > N_SHOPS:
        return "kiosk"
    return "cafe" if number in CAFES else "bakery"


def kiosks_and_stalls(seed: int = SEED) -> np.ndarray:
    """Units of the kiosks, then of the stalls, (N_KIOSKS + N_STALLS, N_MONTHS), drawn from a
    stream of their own."""
    rng = np.random.default_rng([seed, 1])
    calendar = np.arange(N_MONTHS) % 12
    # kiosks: a first year of their own, then each month = the same month a year before times
    # a lasting lognormal change (a seasonal random walk in logarithms)
    first = rng.uniform(150.0, 400.0, N_KIOSKS)[:, None] * (
        1.0 + rng.uniform(0.6, 1.4, N_KIOSKS)[:, None] * (SEASON_SHAPE[None, :] - 1.0)
    ) * np.exp(rng.normal(0.0, 0.06, (N_KIOSKS, 12)))
    steps = rng.normal(0.0, 0.10, (N_KIOSKS, N_MONTHS - 12))
    logs = np.log(first)
    kiosk = np.empty((N_KIOSKS, N_MONTHS))
    kiosk[:, :12] = logs
    for m in range(12, N_MONTHS):
        kiosk[:, m] = kiosk[:, m - 12] + steps[:, m - 12]
    kiosk = np.maximum(np.rint(np.exp(kiosk)), 1)
    # stalls: open with a chance of their own (90% in December), then a lognormal quantity
    chance = rng.uniform(0.25, 0.45, N_STALLS)
    size = rng.uniform(40.0, 160.0, N_STALLS)
    spread = rng.uniform(0.3, 1.0, N_STALLS)
    p_open = np.where(calendar[None, :] == 11, 0.90, chance[:, None])
    opened = rng.random((N_STALLS, N_MONTHS)) < p_open
    sold = size[:, None] * np.exp(spread[:, None] * rng.normal(0.0, 1.0, (N_STALLS, N_MONTHS)))
    stall = np.where(opened, np.maximum(np.rint(sold), 1), 0)
    return np.vstack([kiosk, stall]).astype(int)


def generate(seed: int = SEED) -> list[tuple[str, str, int, int, str]]:
    """Rows (shop, month, units, promo, format), sorted by shop then month."""
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

    others = kiosks_and_stalls(seed)
    units = np.vstack([units, others])
    promo = np.vstack([promo, np.zeros_like(others)])

    labels = [f"{START_YEAR + m // 12:04d}-{m % 12 + 1:02d}-01" for m in months]
    return [
        (f"TR-{s + 1:02d}", labels[m], int(units[s, m]), int(promo[s, m]), shop_format(s + 1))
        for s in range(N_SHOPS + N_KIOSKS + N_STALLS)
        for m in range(N_MONTHS)
    ]


def render(rows: list[tuple[str, str, int, int, str]]) -> bytes:
    """The CSV text: a header, one line per row, ``\\n`` line ends, UTF-8."""
    lines = ["shop,month,units,promo,format"] + [
        f"{s},{m},{u:d},{p:d},{f}" for s, m, u, p, f in rows
    ]
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
    print(f"{args.out}: {len(content):,} bytes, {N_SHOPS} shops, {N_KIOSKS} kiosks and "
          f"{N_STALLS} stalls x {N_MONTHS} months")
    return 0


if __name__ == "__main__":
    sys.exit(main())
