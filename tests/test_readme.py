"""The README's Python examples run and print what the README shows.

Every ```pycon block is run as a doctest, the blocks one after the other in one namespace (they
build on each other); every ```python block is executed, except those announced by an HTML
comment ``<!-- not run: why -->``. The blocks run in a temporary directory, where the file the
README reads (``runs/out/demo.h5``, written by ``tba demo``) is stood in for by a small scan
with the same models, alpha and state.

Output is compared to the digits shown: text must match (up to white space), a number agrees
when the printed value differs from the README's by at most half a unit of its last digit
(the README may show fewer digits than Python prints), integers exactly, and numbers below
1e-12 in the README, error estimates at the rounding level, to their order of magnitude (a
factor 10 either way), since they depend on how sums round. Common practice (doctest), no
source.
"""

import doctest
import io
import os
import re
from pathlib import Path

import pytest

from tba.scans.runfile import loads_run
from tba.store.driver import run_scan

ROOT = Path(__file__).resolve().parents[1]
BLOCK = re.compile(r"(?P<skip><!-- not run:[^>]*-->\n)?```(?P<lang>pycon|python)\n(?P<body>.*?)```",
                   re.S)
NUMBER = re.compile(r"[-+]?(?:\d+\.\d*|\.\d+|\d+)(?:[eE][-+]?\d+)?")
#: README numbers below this are rounding-level estimates, compared by order of magnitude
ROUNDING_LEVEL = 1e-12

STAND_IN = """\
# a stand-in for the demo's file: the models, alpha and state the README reads
output = "runs/out/demo.h5"

[[models]]
name = "sinh-gordon"
coupling = 0.6

[[models]]
name = "ising-e8"

[[models]]
name = "lee-yang"

[deformation]
alphas = [0.1]

[radii]
start = 1.0
stop = 2.0
count = 2
"""


def _blocks():
    text = (ROOT / "README.md").read_text(encoding="utf-8")
    for match in BLOCK.finditer(text):
        line = text.count("\n", 0, match.start("body")) + 1
        yield match["lang"], match["body"], line, match["skip"] is not None


def number_agrees(shown, printed):
    """``printed`` agrees with ``shown`` to the digits shown (see the module docstring)."""
    w, g = float(shown), float(printed)
    if not re.search(r"[.eE]", shown):
        return w == g
    if w != 0 and abs(w) < ROUNDING_LEVEL:
        return g != 0 and 0.1 <= g / w <= 10
    mantissa, _, exponent = shown.lower().partition("e")
    decimals = len(mantissa.partition(".")[2])
    unit = 10.0 ** (int(exponent or 0) - decimals)
    return abs(g - w) <= 0.5 * unit * (1 + 1e-9)


def output_agrees(want, got):
    shown, printed = NUMBER.findall(want), NUMBER.findall(got)
    words = [" ".join(part.split()) for part in NUMBER.split(want)]
    printed_words = [" ".join(part.split()) for part in NUMBER.split(got)]
    return (words == printed_words and len(shown) == len(printed)
            and all(number_agrees(w, g) for w, g in zip(shown, printed)))


class DigitsShown(doctest.OutputChecker):
    def check_output(self, want, got, optionflags):
        return output_agrees(want, got)


def test_the_comparison_can_fail():
    assert output_agrees("converged -0.21098821927066 1e-15", "converged -0.2109882192706563 1.2e-15")
    assert not output_agrees("converged -0.21098821927066", "converged -0.21098821927076")
    assert not output_agrees("1e-15", "3e-13")  # two orders of magnitude off
    assert not output_agrees("[0, 1]", "[0, 2]") and not output_agrees("found", "none")
    assert output_agrees("(-1.12667880358+0.435246429076j)", "(-1.1266788035843318+0.4352464290759027j)")


@pytest.mark.slow
def test_readme_examples_print_what_the_readme_shows(tmp_path):
    blocks = list(_blocks())
    assert sum(lang == "pycon" for lang, *_ in blocks) >= 4
    cwd = os.getcwd()
    os.chdir(tmp_path)
    try:
        run_scan(loads_run(STAND_IN, base_dir=tmp_path), workers=1, log=io.StringIO())
        parser, report = doctest.DocTestParser(), []
        runner = doctest.DocTestRunner(checker=DigitsShown(), optionflags=doctest.NORMALIZE_WHITESPACE)
        globs = {}
        examples = 0
        for lang, body, line, skip in blocks:
            if skip:
                continue
            if lang == "python":
                exec(compile(body, f"README.md, line {line}", "exec"), {})
                continue
            test = parser.get_doctest(body, globs, f"README.md, line {line}", "README.md", line - 1)
            test.globs = globs  # DocTest copies them: share one namespace across the blocks
            examples += len(test.examples)
            runner.run(test, out=report.append, clear_globs=False)
        assert examples >= 30
        assert runner.failures == 0, "\n".join(report)
    finally:
        os.chdir(cwd)
