"""Write the invented ``sparse`` demo data set of mcexact (``mcexact/data/rash_registry.csv``).

The data are simulated here, with a fixed seed, for this package; they describe no real study,
medicine or centre. The scenario: a paediatric safety registry of an invented anti-seizure
medicine at 30 centres. Each child starts on the medicine and is titrated along the protocol's
dosing table in steps of 1.25 mg/kg/day, recorded as printed in the table to one decimal
(1.2, 2.5, 3.8, 5.0, 6.2, 7.5, 8.8, 10.0 mg/kg/day). Some children also take a medicine of an
(invented) enzyme-inhibiting class, which raises exposure. The outcome is a serious skin reaction
(a rash needing hospital care) within 12 weeks: rare, a few percent, so most centres see none to
three and the co-medicated cell holds a handful of events.

Columns written: ``child`` (identifier), ``centre`` (centre code), ``age`` (whole years, 1-17),
``dose_mg_kg`` (maintenance dose, mg/kg/day, one decimal), ``comed`` (1 if co-medicated, else
0), ``rash`` (1 if the reaction occurred, else 0).

Running the script again reproduces the shipped file byte for byte (tests/test_demo_data.py checks
that). Usage::

    python benchmarks/make_demo_data.py              # writes mcexact/data/rash_registry.csv
    python benchmarks/make_demo_data.py --out FILE   # writes FILE instead
"""

from __future__ import annotations

import argparse
import os
import tempfile
from pathlib import Path

import numpy as np

#: Seed of the simulation (numpy's default generator).
SEED = 208
N_CENTRES = 30
#: Children per centre: uniform on this closed range.
CENTRE_SIZE = (20, 70)
#: The dosing table as printed (steps of 1.25 mg/kg/day rounded to one decimal).
DOSE_TABLE = (1.2, 2.5, 3.8, 5.0, 6.2, 7.5, 8.8, 10.0)
#: Chance of one more titration step (the step index is binomial over the table).
STEP_UP = 0.45
COMED_SHARE = 0.07
#: Log odds of the outcome: intercept at dose 5.0 mg/kg/day and age 9, slopes, centre spread.
INTERCEPT = -3.3
DOSE_SLOPE = 0.15      # per mg/kg/day
COMED_EFFECT = 1.2
AGE_SLOPE = -0.04      # per year
CENTRE_SD = 0.5

COLUMNS = ("child", "centre", "age", "dose_mg_kg", "comed", "rash")
DEFAULT_OUT = Path(__file__).resolve().parents[1] / "mcexact" / "data" / "rash_registry.csv"


def simulate(seed: int = SEED) -> list[tuple]:
    """The rows of the data set, one per child, in centre order.

    Parameters
    ----------
    seed : int
        Seed of ``numpy.random.default_rng``.

    Returns
    -------
    list of tuple
        ``(child, centre, age, dose_mg_kg, comed, rash)`` per child.
    """
    rng = np.random.default_rng(seed)
    table = np.asarray(DOSE_TABLE)
    rows = []
    for c in range(N_CENTRES):
        n = int(rng.integers(CENTRE_SIZE[0], CENTRE_SIZE[1] + 1))
        centre_effect = rng.normal(0.0, CENTRE_SD)
        age = rng.integers(1, 18, n)
        dose = table[rng.binomial(len(DOSE_TABLE) - 1, STEP_UP, n)]
        comed = (rng.random(n) < COMED_SHARE).astype(int)
        eta = (INTERCEPT + centre_effect + DOSE_SLOPE * (dose - 5.0) + COMED_EFFECT * comed
               + AGE_SLOPE * (age - 9))
        rash = (rng.random(n) < 1.0 / (1.0 + np.exp(-eta))).astype(int)
        for i in range(n):
            rows.append((f"K{len(rows) + 1:04d}", f"H{c + 1:02d}", int(age[i]), float(dose[i]),
                         int(comed[i]), int(rash[i])))
    return rows


def csv_text(rows: list[tuple]) -> str:
    """The rows as CSV text with a header line (``\\n`` line ends, doses with one decimal)."""
    lines = [",".join(COLUMNS)]
    for child, centre, age, dose, comed, rash in rows:
        lines.append(f"{child},{centre},{age},{dose:.1f},{comed},{rash}")
    return "\n".join(lines) + "\n"


def write_atomically(text: str, path: Path) -> None:
    """Write `text` to `path` through a temporary file in the same folder and ``os.replace``."""
    path = Path(path)
    umask = os.umask(0)
    os.umask(umask)
    fd, tmp = tempfile.mkstemp(prefix=path.name + ".", suffix=".tmp", dir=path.parent)
    try:
        with os.fdopen(fd, "w", encoding="utf-8", newline="") as fh:
            fh.write(text)
        os.chmod(tmp, 0o666 & ~umask)           # mkstemp makes the file private (0600)
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--out", type=Path, default=DEFAULT_OUT, help="file to write")
    args = parser.parse_args(argv)
    rows = simulate()
    write_atomically(csv_text(rows), args.out)
    events = sum(r[-1] for r in rows)
    print(f"wrote {args.out}: {len(rows)} children, {events} with the outcome")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
