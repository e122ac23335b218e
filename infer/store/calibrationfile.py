"""The record of a calibration over mocks (``NAME.calibration.h5``, our layout; `infer.forecast.calibrate`):
the request it answers and every finished mock, rewritten crash-safely (new file, atomic rename)."""
from __future__ import annotations

import numpy as np
from infer.errors import UserError

# -- the record of finished mocks: NAME.calibration.h5 -------------------------------------------------
from infer.analysis.calibration import LEVELS, inside

FORMAT, FORMAT_VERSION = "infer-calibration", 1
#: Per-mock scalars of the record besides truth, rank and interval hits.
SCALARS = ("ess", "exact_calls", "converged", "seconds", "engine_seed")
#: Arguments a continued calibration must repeat exactly (a larger --mocks extends it).
FROZEN = ("run_file_sha256", "dataset_sha256", "spec_sha256", "seed", "fit_cov_scale", "engine", "names")


class Record:
    """Finished mocks (rows in completion order; ``index`` says which mock) and the failed ones."""

    def __init__(self, req: dict, rows: dict | None = None, failed: dict | None = None):
        P = len(req["names"])
        self.request = req
        self.rows = rows or {"index": np.zeros(0, np.int64), "truth": np.zeros((0, P)), "rank": np.zeros((0, P)),
                             **{k: np.zeros(0) for k in SCALARS}}
        self.failed = failed or {"index": np.zeros(0, np.int64), "reason": []}

    @property
    def done(self) -> set:
        """Finished mocks and those that failed for good (a worker that died is tried again on a rerun)."""
        from infer.parallel import DIED
        kept = [i for i, r in zip(self.failed["index"].tolist(), self.failed["reason"]) if r != DIED]
        return set(self.rows["index"].tolist()) | set(kept)

    def add(self, index: int, lp: float, blob, reason, P: int) -> None:
        again = self.failed["index"] == index
        if again.any():
            self.failed = {"index": self.failed["index"][~again],
                           "reason": [r for r, a in zip(self.failed["reason"], again) if not a]}
        if reason is not None:
            self.failed = {"index": np.append(self.failed["index"], index), "reason": self.failed["reason"] + [reason]}
            return
        r = self.rows
        r["index"] = np.append(r["index"], index)
        r["truth"] = np.vstack([r["truth"], blob[:P]])
        r["rank"] = np.vstack([r["rank"], blob[P:2 * P]])
        for k, v in zip(SCALARS, blob[2 * P:]):
            r[k] = np.append(r[k], v)

    def sorted(self, upto: int) -> dict:
        """The finished mocks with index < ``upto``, in index order."""
        r = self.rows
        keep = np.flatnonzero(r["index"] < upto)
        keep = keep[np.argsort(r["index"][keep])]
        return {k: v[keep] for k, v in r.items()}

    def write(self, path) -> None:
        """Crash-safe: a new file under a temporary name, renamed over the old one (`infer.atomic`)."""
        import json
        import h5py
        from infer.atomic import write_atomic

        def fill(tmp):
            with h5py.File(tmp, "w") as h5:
                h5.attrs["format"], h5.attrs["format_version"] = FORMAT, np.int64(FORMAT_VERSION)
                h5.attrs["request"] = json.dumps(self.request, sort_keys=True)
                g = h5.create_group("mocks")
                for k, v in self.rows.items():
                    g.create_dataset(k, data=v)
                for lv in LEVELS:
                    g.create_dataset(f"inside_{round(100 * lv)}", data=inside(self.rows["rank"], lv))
                f = h5.create_group("failed")
                f.create_dataset("index", data=self.failed["index"])
                f.create_dataset("reason", data=np.array(self.failed["reason"], dtype=object),
                                 dtype=h5py.string_dtype())
        write_atomic(path, fill)

    @classmethod
    def read(cls, path) -> "Record":
        import json
        import h5py
        from infer import paths
        if paths.hdf5_format(path) != FORMAT:
            raise UserError(f"{path} exists and is not an infer calibration record; choose another --out or "
                            "move the file yourself")
        try:
            with h5py.File(path, "r") as h5:
                req = json.loads(h5.attrs["request"])
                rows = {k: np.asarray(h5["mocks"][k]) for k in ("index", "truth", "rank") + SCALARS}
                failed = {"index": np.asarray(h5["failed/index"]),
                          "reason": [r.decode() if isinstance(r, bytes) else str(r) for r in h5["failed/reason"]]}
        except (OSError, KeyError, ValueError) as err:
            raise UserError(f"{path}: damaged calibration record ({err.__class__.__name__}: {err})") from None
        return cls(req, rows, failed)

    def check(self, req: dict, path) -> None:
        """Refuse, in one line, a continuation with other arguments than the record's."""
        changed = [f"{k}: {self.request.get(k)!r} → {req.get(k)!r}" for k in FROZEN if self.request.get(k) != req.get(k)]
        if changed:
            raise UserError(f"{path} was made with other arguments ({'; '.join(changed)}); repeat them to continue, "
                            "or give another --out")


