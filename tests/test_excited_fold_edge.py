"""An excited level at the edge of having a fold (`excited_branch_point`): both zeros of
dR/dR~ within one step of the walk. Apart from tests/test_excited_fold.py to keep each file fast."""

import tba
from tba.physics.flow import excited_branch_point

SG_STATE = "-1/2,1/2"


def test_sinh_gordon_fold_at_the_edge():
    # at alpha = -0.8 (B = 0.6) both zeros of dR/dR~ lie within one step of the walk (the
    # level is close to having no fold, docs/physics.md section 4): still found, and bracketed
    # by the deformed solver (common practice, no source). So close to the cusp where the two
    # folds merge the bracket must be tight: at R_c (1 - 1e-3) switching alpha on at fixed R
    # reaches the real solution of the other sheet, beyond the second fold.
    sg = tba.sinh_gordon(0.6)
    bp = excited_branch_point(sg, SG_STATE, -0.8)
    assert bp.status == "found" and bp.radius_error < 1e-12
    assert tba.solve(sg, bp.radius * (1 + 1e-4), tba.ttbar(-0.8), state=SG_STATE).converged
    assert tba.solve(sg, bp.radius * (1 - 1e-4), tba.ttbar(-0.8), state=SG_STATE).status \
        is tba.Status.NO_REAL_SOLUTION
