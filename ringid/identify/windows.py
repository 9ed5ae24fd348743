"""The identification defaults that the config, the command line and the code share (no heavy imports).

The config schema (config/config.schema.yaml) gives the same values; tests/test_layout.py checks that
they agree.
"""

#: ± relative lattice-scale window searched with a standard film or a known camera constant
WINDOW_STANDARD = 0.005
#: the same with a nominal camera length (a few % uncertain)
WINDOW_NOMINAL = 0.03
#: a phase is reported when its false-identification probability is below this (over the set)
FALSE_IDENTIFICATION_RATE = 0.01

#: dilation window by how the sample's camera constant was obtained
WINDOW_BY_CALIBRATION = {"standard": WINDOW_STANDARD, "constant": WINDOW_STANDARD, "nominal": WINDOW_NOMINAL}


def window_for(calibration_kind: str, standard: float = WINDOW_STANDARD, nominal: float = WINDOW_NOMINAL) -> float:
    """The dilation window of a calibration kind (standard, constant or nominal)."""
    return nominal if calibration_kind == "nominal" else standard
