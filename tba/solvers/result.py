"""What a solve returns: status codes and the result object."""

import enum
import html
from dataclasses import dataclass, field
from typing import Optional

import numpy as np


class Status(str, enum.Enum):
    """Outcome of one point. The string values are part of the command-line/JSON contract."""

    CONVERGED = "converged"
    NO_REAL_SOLUTION = "no-real-solution"
    NOT_CONVERGED = "not-converged"

    def __str__(self):
        return self.value


#: Integer codes stored in HDF5 files next to the energies.
STATUS_CODES = {Status.CONVERGED: 0, Status.NO_REAL_SOLUTION: 1, Status.NOT_CONVERGED: 2}


class SolveError(RuntimeError):
    """Raised by `SolveResult.raise_for_status` for a point without a trusted energy."""


@dataclass
class SolveResult:
    """One solved point.

    ``energy`` and ``error`` are NaN unless ``status`` is CONVERGED; ``error`` is an
    estimate of |energy - exact| that is meant to bound it (see README, Errors).
    """

    model: str
    radius: float
    couplings: dict
    status: Status
    coupling: Optional[float] = None
    energy: float = np.nan
    error: float = np.nan
    momentum: float = 0.0
    message: str = ""
    iterations: int = 0
    residual: float = np.nan
    effective_radius: float = np.nan
    fold_indicator: float = np.nan
    grid: Optional[object] = None
    #: the rapidity grid t_i and the pseudo-energies eps_a(t_i) on it (shape n_species x N)
    rapidity_grid: Optional[np.ndarray] = field(default=None, repr=False)
    pseudo_energies: Optional[np.ndarray] = field(default=None, repr=False)
    #: excited states: the Bethe quantum numbers I_k naming the level and the particle
    #: rapidities t_k; empty for the ground state
    state: tuple = ()
    rapidities: tuple = ()
    #: data for warm starts and derivatives, not part of the public contract
    _state: Optional[object] = field(default=None, repr=False)

    @property
    def converged(self):
        return self.status is Status.CONVERGED

    @property
    def alpha(self):
        return self.couplings.get(1, 0.0)

    @property
    def cdd_couplings(self):
        """{spin: alpha_s} of the deformation (the same dict as ``couplings``; the JSON key is
        ``cdd_couplings``, apart from the model's own ``coupling``)."""
        return self.couplings

    def _fields(self):
        """(name, value) pairs shown by the reprs: full precision for R, alpha and E."""
        label = _model_label(self.model, self.coupling)
        cdd = ", ".join(("alpha" if s == 1 else f"alpha_{s}") + f" = {a!r}"
                        for s, a in self.couplings.items()) or "alpha = 0"
        level = ",".join(str(n) for n in self.state) if self.state else "ground"
        out = [("model", label), ("state", level), ("R", repr(self.radius)),
               ("deformation", cdd), ("status", self.status.value)]
        if self.converged:
            out.append(("E", f"{self.energy!r} +- {self.error:.2g}"))
            if self.state:
                out.append(("P", repr(self.momentum)))
            if self.rapidities:
                out.append(("rapidities", "(" + ", ".join(f"{t:.6g}" for t in self.rapidities) + ")"))
        out += [("iterations", str(self.iterations)), ("message", self.message)]
        return out

    def __repr__(self):
        """One line: ``SolveResult(sinh-gordon B=0.6, ground state, R = 1.0, alpha = 0.2:
        converged, E = -0.2209223083524193 +- 9.1e-16, 6 iterations)``; excited levels say
        ``state -1/2,1/2`` and add P and the rapidities; the message when not converged."""
        f = dict(self._fields())
        state = "ground state" if f["state"] == "ground" else f"state {f['state']}"
        what = f"{f['model']}, {state}, R = {f['R']}, {f['deformation']}: {f['status']}"
        if self.converged:
            extra = "".join(f", {k} = {f[k]}" for k in ("P", "rapidities") if k in f)
            return f"SolveResult({what}, E = {f['E']}{extra}, {self.iterations} iterations)"
        return f"SolveResult({what}, {self.message!r})"

    def _repr_html_(self):
        """A two-column table for notebooks."""
        rows = "".join(f"<tr><th style='text-align:left'>{html.escape(k)}</th>"
                       f"<td style='text-align:left'>{html.escape(v)}</td></tr>"
                       for k, v in self._fields())
        return f"<table><caption>SolveResult</caption>{rows}</table>"

    def raise_for_status(self):
        """Raise `SolveError` unless the point converged; return self otherwise."""
        if not self.converged:
            raise SolveError(f"{self.model} at R = {self.radius}: {self.status.value}: {self.message}")
        return self

    def as_record(self, deprecated=True):
        """The JSON-ready record of the command-line contract (plain Python numbers).
        ``cdd_couplings`` is {"spin": alpha_s}; ``deprecated``: also under its earlier key
        ``couplings``, kept for one release (README, "Renamed outputs")."""
        ok = self.converged
        cdd = {str(k): float(v) for k, v in self.couplings.items()}
        rec = {
            "model": self.model,
            "coupling": self.coupling,
            "radius": self.radius,
            "alpha": self.alpha,
            "cdd_couplings": cdd,
            "energy": float(self.energy) if ok else None,
            "error": float(self.error) if ok else None,
            "status": self.status.value,
            "iterations": int(self.iterations),
            "message": self.message,
            **({"state": [_number(n) for n in self.state],
                "momentum": float(self.momentum) if ok else None,
                "rapidities": [float(t) for t in self.rapidities] if ok else None}
               if self.state else {}),
        }
        if deprecated:
            rec["couplings"] = dict(cdd)
        return rec


def _model_label(name, coupling):
    """``name``, or ``name B=0.6`` / ``name N=3`` / ``name n=24`` with the model's parameter."""
    if coupling is None:
        return name
    from tba.models.catalog import ModelError, model_label

    try:
        return model_label(name, coupling)
    except ModelError:  # a user model with a coupling
        return f"{name} B={coupling!r}"


def _number(n):
    """A quantum number for JSON: an int when integral, else a float (half-odd: x.5)."""
    return int(n) if float(n).is_integer() else float(n)
