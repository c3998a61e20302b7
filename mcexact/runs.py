"""Saved runs: an analysis written to one file that can be reopened, reported again and extended.

A saved run holds everything :meth:`FitResult.extend <mcexact.fit.FitResult.extend>` needs to
continue every Monte Carlo part exactly where it stopped (so that extending gives the result of one
uninterrupted run of the total length) and everything a report shows, without recomputing:

- the design (its coded arrays and names), the settings of the run (engine choice, node budget,
  Monte Carlo options, precision targets) and the seed of every part;
- per part: its engine and record; an exact part's conditional distribution; a Monte Carlo part's
  draws per chain and each chain's state (bit generator state, and for Markov chains the current
  response vector and swap units);
- the result tables (tests, estimates, joint estimate), the notes and the interruption flag.

File format: a NumPy ``.npz`` (zip) archive. The array ``header`` holds a UTF-8 JSON document with
``format`` = ``"mcexact.run"`` and ``version`` = 1 and all the non-array content; every array is
stored under a name the header refers to. Nothing is pickled, so opening a file runs no code from
it. Writes are atomic: the archive is written to a temporary file in the target folder, flushed
to disk and renamed over the target, so a run killed at any moment leaves an earlier file intact.
"""

from __future__ import annotations

import json
import pathlib
import zipfile
from datetime import datetime, timezone

import numpy as np
import pandas as pd

from mcexact._exceptions import FileFormatError
from mcexact._files import atomic_open
from mcexact._json import plain

__all__ = ["save_run", "load_run", "FILE_FORMAT", "FILE_VERSION"]

FILE_FORMAT = "mcexact.run"
FILE_VERSION = 2
# Versions this mcexact reads. Version 2 adds the block chains' Rao-Blackwellized moment records
# (``Sample.moment_draws``); a version-1 run has none, and extending it keeps the null moments its
# draws gave, as when it was made.
READABLE_VERSIONS = (1, 2)

_DESIGN_ARRAYS = ("events", "trials", "stratum", "interest", "nuisance", "interest_scales",
                  "nuisance_scales")
_DESIGN_FIELDS = ("fix_stratum_totals", "interest_names", "nuisance_names", "effects",
                  "stratum_labels", "response_name", "formula", "strata_name", "trials_name",
                  "n_rows", "n_dropped_strata", "n_dropped_rows", "notes")
_OPTION_FIELDS = ("n_draws", "n_chains", "n_warmup", "thin", "block_size", "n_jobs", "backend")


class _Writer:
    """Collects arrays under generated names while the header is built."""

    def __init__(self):
        self.arrays: dict[str, np.ndarray] = {}

    def put(self, name: str, array) -> str:
        array = np.asarray(array)
        if array.dtype == object:
            raise TypeError(f"{name}: object arrays are not stored")
        self.arrays[name] = array
        return name


def _bit_state(state: dict) -> dict:
    # PCG64 states are dicts of Python ints (128-bit): JSON keeps them exactly as integers.
    return plain(state)


def _frame(w: _Writer, prefix: str, frame: pd.DataFrame) -> dict:
    """A data frame as typed arrays (numeric columns) and JSON lists (the others)."""
    cols = []
    for col in frame.columns:
        values = frame[col]
        if values.dtype.kind in "biuf":
            cols.append({"name": col, "array": w.put(f"{prefix}/{col}", values.to_numpy())})
        else:
            cols.append({"name": col, "values": plain(values.tolist()),
                         "dtype": str(values.dtype)})
    return {"columns": cols, "n_rows": int(frame.shape[0])}


def _unframe(spec: dict, arrays) -> pd.DataFrame:
    data = {}
    for c in spec["columns"]:
        if "array" in c:
            data[c["name"]] = arrays[c["array"]]
        else:
            data[c["name"]] = pd.Series(c["values"], dtype=object if c["dtype"] == "object"
                                        else c["dtype"])
    return pd.DataFrame(data, columns=[c["name"] for c in spec["columns"]])


def _distribution(w: _Writer, prefix: str, dist) -> dict:
    out = {"names": list(dist.names), "info": plain(dist.info), "iid": bool(dist.iid)}
    for name in ("support", "log_weights", "observed", "scales", "support_min", "support_max",
                 "null_mean", "null_cov"):
        value = getattr(dist, name)
        if value is not None:
            out[name] = w.put(f"{prefix}/{name}", value)
    return out


def _undistribution(spec: dict, arrays):
    from mcexact.distribution import ConditionalDistribution

    kw = {name: arrays[spec[name]] for name in (
        "support", "log_weights", "observed", "scales", "support_min", "support_max",
        "null_mean", "null_cov") if name in spec}
    return ConditionalDistribution(names=tuple(spec["names"]), info=spec["info"],
                                   iid=spec["iid"], **kw)


def _sample(w: _Writer, prefix: str, sample) -> dict:
    out = {"engine": sample.engine, "names": list(sample.names), "log_total": sample.log_total,
           "seconds": float(sample.seconds), "info": plain(sample.info),
           "observed": w.put(f"{prefix}/observed", sample.observed),
           "scales": w.put(f"{prefix}/scales", sample.scales),
           "chains": [w.put(f"{prefix}/chain{c}", ch) for c, ch in enumerate(sample.chains)],
           "counters": [w.put(f"{prefix}/counters{c}", ct)
                        for c, ct in enumerate(sample.counters)],
           "states": []}
    if sample.moment_draws is not None:
        out["moment_draws"] = [w.put(f"{prefix}/moments{c}", md)
                               for c, md in enumerate(sample.moment_draws)]
    if sample.beta is not None:
        raise ValueError("tilted samples are not part of a saved run")
    for name in ("support_min", "support_max", "null_mean", "null_cov"):
        value = getattr(sample, name)
        if value is not None:
            out[name] = w.put(f"{prefix}/{name}", value)
    for c, st in enumerate(sample.states):
        rec = {"bit_generator": _bit_state(st["bit_generator"])}
        if st.get("y") is not None:
            rec["y"] = w.put(f"{prefix}/state{c}/y", st["y"])
        if st.get("units") is not None:
            rec["units"] = {k: w.put(f"{prefix}/state{c}/units/{k}", v)
                            for k, v in st["units"].items()}
        out["states"].append(rec)
    return out


def _unsample(spec: dict, arrays):
    from mcexact.montecarlo import Sample

    states = []
    for rec in spec["states"]:
        st = {"bit_generator": rec["bit_generator"]}
        if "y" in rec:
            st["y"] = np.array(arrays[rec["y"]])
        if "units" in rec:
            st["units"] = {k: np.array(arrays[v]) for k, v in rec["units"].items()}
        states.append(st)
    opt = {name: np.array(arrays[spec[name]]) for name in (
        "support_min", "support_max", "null_mean", "null_cov") if name in spec}
    if "moment_draws" in spec:
        opt["moment_draws"] = [np.array(arrays[a]) for a in spec["moment_draws"]]
    return Sample(spec["engine"], [np.array(arrays[a]) for a in spec["chains"]],
                  np.array(arrays[spec["observed"]]), tuple(spec["names"]),
                  np.array(arrays[spec["scales"]]), log_total=spec["log_total"],
                  counters=[np.array(arrays[a]) for a in spec["counters"]], states=states,
                  seconds=spec["seconds"], info=dict(spec["info"]), **opt)


def _seed(seed: np.random.SeedSequence) -> dict:
    entropy = seed.entropy
    return {"entropy": plain(entropy) if not isinstance(entropy, (list, tuple, np.ndarray))
            else [int(x) for x in entropy],
            "spawn_key": [int(x) for x in seed.spawn_key], "pool_size": int(seed.pool_size)}


def _unseed(spec: dict) -> np.random.SeedSequence:
    return np.random.SeedSequence(spec["entropy"], spawn_key=tuple(spec["spawn_key"]),
                                  pool_size=spec["pool_size"])


def _header(result, w: _Writer) -> dict:
    import mcexact

    run = result._run
    if not run:
        raise FileFormatError("this result holds no run to save (it was not made by fit)")
    d = result.design
    design = {name: w.put(f"design/{name}", getattr(d, name)) for name in _DESIGN_ARRAYS}
    design.update({name: plain(getattr(d, name)) for name in _DESIGN_FIELDS})
    settings = dict(run["settings"])
    options = settings.pop("options")
    settings["options"] = {name: plain(getattr(options, name)) for name in _OPTION_FIELDS}
    parts = {}
    for part, rec in run["parts"].items():
        out = {"engine": rec["engine"], "info": plain(rec["info"])}
        if rec.get("dist") is not None:
            out["dist"] = _distribution(w, f"part/{part}/dist", rec["dist"])
        if rec.get("sample") is not None:
            out["sample"] = _sample(w, f"part/{part}/sample", rec["sample"])
        parts[part] = out
    joint = result.joint_estimate
    return {
        "format": FILE_FORMAT, "version": FILE_VERSION, "mcexact_version": mcexact.__version__,
        "created": datetime.now(timezone.utc).isoformat(timespec="seconds"),
        "design": design, "settings": plain(settings),
        "seeds": {part: _seed(s) for part, s in run["seeds"].items()},
        "parts": parts,
        "tests": _frame(w, "tests", result.tests),
        "estimates": _frame(w, "estimates", result.estimates),
        "joint_estimate": (None if joint is None else
                           {"names": list(joint.index),
                            "values": w.put("joint_estimate", joint.to_numpy(float))}),
        "method": plain(result.method), "alpha": float(result.alpha),
        "notes": list(result.notes), "interrupted": bool(result.interrupted),
    }


def save_run(result, path) -> pathlib.Path:
    """Write `result` (from :func:`mcexact.fit`, :func:`load_run` or ``extend``) to `path`.

    The file is replaced atomically; on any error the temporary file is removed and an existing
    file at `path` is left as it was.

    Returns
    -------
    pathlib.Path
        The path written.
    """
    path = pathlib.Path(path)
    w = _Writer()
    header = json.dumps(_header(result, w), allow_nan=False)
    try:
        with atomic_open(path) as fh:
            np.savez(fh, header=np.array(header), **w.arrays)
    except FileNotFoundError as exc:
        raise FileFormatError(f"cannot write a saved run at {path}: {exc}") from exc
    return path


def load_run(path):
    """Reopen a saved run as a :class:`~mcexact.fit.FitResult` that can be reported again and
    extended.

    Raises
    ------
    FileFormatError
        If the file is missing, unreadable, not a saved mcexact run, of a version this mcexact
        does not read, or damaged.
    """
    path = pathlib.Path(path)
    name = str(path)
    if path.is_file() and not zipfile.is_zipfile(path):
        raise FileFormatError(f"{name} is not a saved mcexact run (not an archive)")
    try:
        archive = np.load(path, allow_pickle=False)
    except FileNotFoundError as exc:
        raise FileFormatError(f"no saved run at {name}") from exc
    except (OSError, ValueError, zipfile.BadZipFile, EOFError) as exc:
        raise FileFormatError(f"{name} is not a saved mcexact run ({exc})") from exc
    try:
        with archive:
            if "header" not in archive.files:
                raise FileFormatError(f"{name} is not a saved mcexact run (no header)")
            header = json.loads(str(archive["header"]))
            if not isinstance(header, dict) or header.get("format") != FILE_FORMAT:
                raise FileFormatError(f"{name} is not a saved mcexact run")
            if header.get("version") not in READABLE_VERSIONS:
                raise FileFormatError(f"{name} is a saved run of version "
                                      f"{header.get('version')!r}; this mcexact reads versions "
                                      + ", ".join(map(str, READABLE_VERSIONS)))
            arrays = {k: archive[k] for k in archive.files if k != "header"}
    except FileFormatError:
        raise
    except (OSError, ValueError, KeyError, zipfile.BadZipFile, EOFError) as exc:
        raise FileFormatError(f"{name} is damaged ({exc})") from exc
    try:
        return _result(header, arrays)
    except (KeyError, TypeError, ValueError, IndexError) as exc:
        raise FileFormatError(f"{name} is damaged or inconsistent ({type(exc).__name__}: "
                              f"{exc})") from exc


def _result(header: dict, arrays: dict):
    from mcexact.asymptotic import asymptotic_fit
    from mcexact.design import Design
    from mcexact.fit import FitResult
    from mcexact.montecarlo import SamplerOptions

    dspec = header["design"]
    design = Design(**{k: arrays[dspec[k]] for k in _DESIGN_ARRAYS},
                    **{k: dspec[k] for k in _DESIGN_FIELDS})
    settings = dict(header["settings"])
    settings["options"] = SamplerOptions(**settings["options"])
    seeds = {part: _unseed(s) for part, s in header["seeds"].items()}
    records, effect_dists = {}, {}
    for part, spec in header["parts"].items():
        rec = {"engine": spec["engine"], "info": spec["info"], "dist": None, "sample": None}
        if "dist" in spec:
            rec["dist"] = _undistribution(spec["dist"], arrays)
        if "sample" in spec:
            rec["sample"] = _unsample(spec["sample"], arrays)
        records[part] = rec
        dist = rec["dist"] if rec["dist"] is not None else (
            rec["sample"].to_distribution() if rec["sample"] is not None else None)
        if dist is not None:
            effect_dists[part] = dist
    joint = effect_dists.pop("joint", None)
    if joint is None and len(design.effects) == 1:
        joint = next(iter(effect_dists.values()), None)
    je = header["joint_estimate"]
    joint_estimate = (None if je is None else
                      pd.Series(arrays[je["values"]], index=je["names"], name="joint_cmle"))
    comparison = asymptotic_fit(design) if settings.get("asymptotic") else None
    run = {"settings": settings, "seeds": seeds, "parts": records}
    return FitResult(design, _unframe(header["tests"], arrays),
                     _unframe(header["estimates"], arrays), joint_estimate, joint, effect_dists,
                     header["method"], comparison, header["alpha"], list(header["notes"]),
                     bool(header["interrupted"]), run)
