"""Side-by-side timing of the observability computation against astropy ``AltAz``.

Our side: the night grid of a semester (Sun, sidereal time and Moon from astropy at knots) plus
:func:`selector.core.observability.observability` for N targets over every dark step. The reference:
astropy ``SkyCoord.transform_to(AltAz(...))`` of a subset of the targets at the same dark steps,
timed on its own and scaled per target-step. Both run in this process on the same arrays; the
script checks that they agree on which steps are above the altitude limit and prints both times
and their ratio.

Usage::

    python benchmarks/targets.py --targets 10000 --nights 183 --subset 50
"""

from __future__ import annotations

import argparse
import datetime
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from selector.core import observability as fu  # noqa: E402
from selector.settings.config import SiteConfig  # noqa: E402


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--targets", type=int, default=10_000)
    ap.add_argument("--nights", type=int, default=183)
    ap.add_argument("--subset", type=int, default=50, help="targets given to astropy AltAz")
    ap.add_argument("--step-min", type=int, default=10)
    ap.add_argument("--moon", action="store_true", help="include a 30-degree Moon distance")
    ap.add_argument("--seed", type=int, default=1)
    args = ap.parse_args(argv)

    import astropy.units as u
    from astropy.coordinates import AltAz, SkyCoord
    from astropy.time import Time

    site = SiteConfig(latitude_deg=-29.0, longitude_deg=-70.0, height_m=2400.0, name="the demo site")
    start = datetime.date(2027, 4, 1)
    end = (start + datetime.timedelta(days=args.nights)).isoformat()
    rng = np.random.default_rng(args.seed)
    ra = rng.uniform(0.0, 360.0, args.targets)
    dec = np.degrees(np.arcsin(rng.uniform(-1.0, 1.0, args.targets)))

    # warm-up: imports and the one-time read of the bundled Earth-rotation table
    fu.observability(ra[:10], dec[:10], fu.night_grid(site, "2027-04-01", "2027-04-02", -18.0, args.step_min), 30.0)

    t0 = time.perf_counter()
    grid = fu.night_grid(site, start.isoformat(), end, -18.0, args.step_min, moon=args.moon)
    t1 = time.perf_counter()
    obs = fu.observability(ra, dec, grid, 30.0, 30.0 if args.moon else None)
    t2 = time.perf_counter()
    n_steps = int(grid.dark.sum())
    ours_s = t2 - t0

    mjd = grid.step_mjd[grid.dark]
    k = min(args.subset, args.targets)
    loc = fu.site_location(site)
    t3 = time.perf_counter()
    with fu.offline_earth_rotation():
        frame = AltAz(obstime=Time(mjd[None, :], format="mjd", scale="utc"), location=loc, pressure=0 * u.hPa)
        alt = SkyCoord(ra[:k, None] * u.deg, dec[:k, None] * u.deg).transform_to(frame).alt.deg
    t4 = time.perf_counter()
    ref_per = (t4 - t3) / (k * n_steps)
    ref_s = ref_per * args.targets * n_steps

    ours_sub = fu.observability(ra[:k], dec[:k], grid, 30.0)
    ref_steps = (alt >= 30.0).sum(axis=1)
    edge = (np.abs(alt - 30.0) < 0.01).sum(axis=1)
    agree = bool(np.all(np.abs(ours_sub.steps - ref_steps) <= edge))

    print(f"targets {args.targets}, nights {args.nights}, dark steps {n_steps} ({args.step_min}-min steps), "
          f"target-steps {args.targets * n_steps:.3g}, Moon limit: {'yes' if args.moon else 'no'}")
    print(f"ours:    {ours_s:8.2f} s   (night grid {t1 - t0:.2f} s, targets {t2 - t1:.2f} s)")
    print(f"astropy: {ref_s:8.2f} s   (AltAz of {k} targets x {n_steps} steps in {t4 - t3:.2f} s, scaled)")
    print(f"ratio astropy / ours: {ref_s / ours_s:.0f}")
    print(f"steps above 30 deg agree with astropy for the {k}-target subset: {agree}")
    print(f"observable targets: {int((obs.reason == '').sum())} of {args.targets}")
    return 0 if agree else 1


if __name__ == "__main__":
    sys.exit(main())
