"""What a scan stores per point and per branch point: variables, status codes, meanings.

Shared by the chunk solver (`tba.scans.points`), which fills these variables, and the
store (`tba.store.hdf5`), which lays them out in HDF5; no I/O here.
"""

import numpy as np

from tba.solvers.result import STATUS_CODES

#: status code of a point that has not been computed yet
NOT_COMPUTED = -1
#: status code of a point whose model does not have the state (`RunSpec.unavailable`)
NOT_AVAILABLE = 3
#: extra codes of flow_status (fixed numbers, apart from the solver's STATUS_CODES)
FLOW_OFF = 10
FLOW_NOT_APPLICABLE = 11
FLOW_NO_ENERGY = 12
#: codes of /branch_points/status
BP_FOUND = 0
BP_NONE = 1
BP_NOT_APPLICABLE = 2
BP_FAILED = 3
BP_CODES = {"found": BP_FOUND, "none": BP_NONE}  # tba.physics.flow.BranchPoint.status -> code

STATUS_MEANINGS = {NOT_COMPUTED: ("not-computed", "the point has not been computed yet"),
                   **{code: (s.value, {"converged": "energy and error estimate are valid",
                                       "no-real-solution": "past the branch point: no real "
                                                           "solution on the branch of the "
                                                           "undeformed theory",
                                       "not-converged": "the error estimate did not reach "
                                                        "the tolerance; no energy stored",
                                       }.get(s.value, s.value))
                      for s, code in sorted(STATUS_CODES.items(), key=lambda kv: kv[1])},
                   NOT_AVAILABLE: ("not-available", "the model does not have this state (the "
                                                    "message says why); never computed")}
FLOW_MEANINGS = {
    NOT_COMPUTED: ("not-computed", "the point has not been computed yet"),
    **{code: (s.value, f"undeformed solve at R + alpha E: {s.value}")
       for s, code in sorted(STATUS_CODES.items(), key=lambda kv: kv[1])},
    FLOW_OFF: ("off", "flow_check = false in the run"),
    FLOW_NOT_APPLICABLE: ("not-applicable", "alpha = 0, higher-spin CDD factors present "
                                            "(the relation is exact for TTbar alone), no "
                                            "undeformed radius, or a state the model lacks"),
    FLOW_NO_ENERGY: ("no-energy", "the deformed point has no energy to check"),
}
BRANCH_MEANINGS = {
    NOT_COMPUTED: ("not-computed", "not computed yet (or scan.branch_points = false)"),
    BP_FOUND: ("found", "R_c located (ground state: E_0'(R~) = 1/alpha, with pole factors the "
                        "fold of the full equations; an excited level: dR/dR~ = 0); "
                        "branch_radius, energy, errors valid"),
    BP_NONE: ("none", "no branch point on this side of alpha (ground state: alpha <= 0, with "
                      "pole factors a real ground state at R = 1e-3; an excited level: no fold "
                      "in R, the message says why)"),
    BP_NOT_APPLICABLE: ("not-applicable", "higher-spin CDD factors in the run (R_c from the "
                                          "undeformed curve holds for TTbar alone), an "
                                          "excited level with pole factors, or a level the "
                                          "model lacks"),
    BP_FAILED: ("failed", "the computation raised an error (see message)"),
}

#: messages are stored as fixed-length UTF-8 strings, so that writing a chunk only overwrites
#: bytes at fixed places in the file and never changes its metadata (see `Store.write_chunk`)
MESSAGE_BYTES = 256

#: name -> (dtype, fill value, attributes) of the per-point data sets
POINT_VARIABLES = {
    "energy": ("f8", np.nan, {"long_name": "energy E(R, alpha) of the state, bulk term excluded",
                              "units": "m_1"}),
    "error": ("f8", np.nan, {"long_name": "error estimate of energy (meant to bound it)",
                             "units": "m_1"}),
    "momentum": ("f8", np.nan, {"long_name": "total momentum P of the state (0 for the ground "
                                             "state); NaN without an energy", "units": "m_1"}),
    "status": ("i1", NOT_COMPUTED, {"long_name": "outcome of the point (see flag_meanings)"}),
    "iterations": ("i4", 0, {"long_name": "Newton iterations spent on the point, all grids"}),
    "message": ("str", "", {"long_name": f"solver message (UTF-8, at most {MESSAGE_BYTES} bytes)"}),
    "flow_radius": ("f8", np.nan, {"long_name": "radius of the undeformed solve of the flow "
                                                "check: sqrt((R + alpha E)^2 - (alpha P)^2)",
                                   "units": "1/m_1"}),
    "flow_prediction": ("f8", np.nan, {"long_name": "flow prediction of E from the undeformed "
                                                    "level at flow_radius",
                                       "units": "m_1"}),
    "flow_error": ("f8", np.nan, {"long_name": "error estimate of flow_prediction, its "
                                               "sensitivity to the error of E included",
                                  "units": "m_1"}),
    "flow_residual": ("f8", np.nan, {"long_name": "flow residual |E(R, alpha) - E_0(R + alpha E, 0)|",
                                     "units": "m_1"}),
    "flow_status": ("i1", NOT_COMPUTED, {"long_name": "outcome of the flow check "
                                                      "(see flag_meanings)"}),
}
DIMS = ("model", "alpha", "radius", "state")
#: name -> (dtype, fill value, attributes) of the data sets in /branch_points (model, alpha).
#: R_c is "branch_radius", not "radius": xarray's DataTree gives a group the coordinates of
#: its parents, and the root coordinate "radius" would hide a variable of that name.
BRANCH_VARIABLES = {
    "branch_radius": ("f8", np.nan, {"long_name": "branch radius R_c of the ground state "
                                                  "(alpha > 0)", "units": "1/m_1"}),
    "branch_radius_error": ("f8", np.nan, {"long_name": "error estimate of R_c",
                                           "units": "1/m_1"}),
    "energy": ("f8", np.nan, {"long_name": "ground-state energy at the branch point, "
                                           "E(R_c, alpha) = E_0(R~, 0), bulk term excluded",
                              "units": "m_1"}),
    "energy_error": ("f8", np.nan, {"long_name": "error estimate of energy", "units": "m_1"}),
    "effective_radius": ("f8", np.nan, {"long_name": "R~ with E_0'(R~) = 1/alpha (undeformed "
                                                     "radius of the branch point)",
                                        "units": "1/m_1"}),
    "status": ("i1", NOT_COMPUTED, {"long_name": "outcome of the branch-point computation "
                                                 "(see flag_meanings)"}),
    "message": ("str", "", {"long_name": f"message (UTF-8, at most {MESSAGE_BYTES} bytes)"}),
}
BRANCH_DIMS = ("model", "alpha")
#: /level_branch_points (schema 5): the same variables per excited level, the fold in R of the
#: level at fixed alpha (`tba.physics.flow.excited_branch_point`); the "ground" column is left
#: not computed (the ground state's branch point is /branch_points)
LEVEL_BRANCH_DIMS = ("model", "alpha", "state")
#: the attributes of /level_branch_points that differ from those of /branch_points
LEVEL_BRANCH_ATTRS = {
    "branch_radius": {"long_name": "branch radius R_c of the excited level: its fold in R at "
                                   "fixed alpha", "units": "1/m_1"},
    "energy": {"long_name": "energy of the level at its branch point E(R_c, alpha) = "
                            "E~(R~_*, 0), bulk term excluded", "units": "m_1"},
    "effective_radius": {"long_name": "R~_* where dR/dR~ = 0 on the level's undeformed curve "
                                      "(P = 0: alpha E~'(R~_*) = 1)", "units": "1/m_1"},
}
