"""Physics names of models, levels and points, shared by the report and the figures.

The vocabulary is the one of docs/glossary.md: a *level* is named by its *state* ("ground", or
its Bethe quantum numbers "-1/2,1/2"); E_0 is the ground state, E_n an excited level, and
"undeformed" is said with the argument alpha = 0, e.g. E_n(R~, 0).

    model_title("sinh-gordon", 0.6)             sinh-Gordon, B = 0.6
    level_title("-1/2,1/2")                     two-particle level I = (-1/2, 1/2)
    level_title("1/2,3/2")                      two-particle level I = (1/2, 3/2), P = 4π/R
    column_title("sinh-gordon", 0.6, "0")       sinh-Gordon, B = 0.6: one-particle level I = 0

Models that are not listed in `MODEL_TITLES` keep their command-line name.
"""

from fractions import Fraction

# the model catalog and the level parser are imported where used: the command line reads
# PANELS and FORMATS when it builds its parser, and should not load the solvers for that

#: the panels of a figure (`tba.output.plotting`) and its file formats: here, so that the
#: command line offers them without importing matplotlib
PANELS = ("energy", "residual", "ceff", "gap", "collapse", "branch")
FORMATS = ("png", "pdf", "svg")

#: digits in tables and messages: the scan's radii (and T_H) to 10, computed values (energies,
#: R_c) to 12; enough to tell apart radii that differ near a branch point (JSON and files keep
#: every digit)
RADIUS_FORMAT = ".10g"
VALUE_FORMAT = ".12g"

MODEL_TITLES = {
    "free-fermion": "free Majorana fermion",
    "sinh-gordon": "sinh-Gordon",
    "lee-yang": "scaling Lee-Yang",
    "ising-e8": "E8 (Ising in a magnetic field)",
    "massless-fermion": "massless Majorana fermion",
    "massless-bosons": "free massless bosons",
    "tricritical-to-ising": "massless flow tricritical Ising → Ising",
}
_COUNTS = {1: "one", 2: "two", 3: "three", 4: "four", 5: "five", 6: "six", 7: "seven", 8: "eight"}


def number(x):
    """A float with all the digits it needs and no more (shortest round trip): 0.6, 1, 0.39354558."""
    text = repr(float(x))
    return text[:-2] if text.endswith(".0") else text


def _entry(name):
    from tba.models.catalog import ModelError, resolve

    try:
        return resolve(name)
    except ModelError:  # a file written by another version may name a model unknown here
        return None


def model_title(name, coupling=None):
    """``sinh-Gordon, B = 0.6``; ``scaling Lee-Yang``; ``free massless bosons, n = 24``."""
    title = MODEL_TITLES.get(name, name)
    entry = _entry(name)
    parameter = entry.parameter if entry is not None and entry.parameter else "B"
    return title if coupling is None else f"{title}, {parameter} = {number(coupling)}"


def is_massless(name):
    """True for the built-in models with massless species (their gap falls like 1/R)."""
    entry = _entry(name)
    return entry is not None and entry.massless


def particles(state):
    """The number of particles of a level (0 for the ground state)."""
    from tba.solvers.levels import GROUND, parse_level

    level = parse_level(state)
    return 0 if level == GROUND else len(level)


def level_title(state):
    """``ground state``, ``one-particle level I = 0``, ``two-particle level I = (-1/2, 1/2)``;
    a moving level adds its momentum, ``P = 4π/R`` (R P = 2 pi sum I_k)."""
    from tba.solvers.levels import GROUND, parse_level

    level = parse_level(state)
    if level == GROUND:
        return "ground state"
    count = _COUNTS.get(len(level), str(len(level)))
    numbers = str(level[0]) if len(level) == 1 else "(" + ", ".join(str(n) for n in level) + ")"
    title = f"{count}-particle level I = {numbers}"
    turns = Fraction(sum(level))
    if turns:
        k = 2 * turns
        factor = "" if k == 1 else "-" if k == -1 else str(k)
        title += f", P = {factor}π/R"
    return title


def column_title(name, coupling, state):
    """``sinh-Gordon, B = 0.6: two-particle level I = (-1/2, 1/2)``."""
    return f"{model_title(name, coupling)}: {level_title(state)}"
