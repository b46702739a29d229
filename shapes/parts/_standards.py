"""Dimension tables from published standards (mm). Values checked in tests against
/work/shared/FACTS.md; rows not in FACTS.md are marked where they are recalled."""

from __future__ import annotations

__all__ = ["HEX_NUT_ISO4032", "WASHER_ISO7089", "COARSE_PITCH_ISO261", "BEARING_ISO15", "GEAR_MODULES_ISO54"]

# ISO 4032 regular hex nuts: across flats s, height m (max).
HEX_NUT_ISO4032 = {
    "M6": {"s": 10.0, "m": 5.2},
    "M8": {"s": 13.0, "m": 6.8},
    "M10": {"s": 16.0, "m": 8.4},
}

# ISO 7089 plain washers: hole d1, outside d2, thickness h. M6/M8/M10 as in FACTS.md;
# M4, M5, M12 from memory (same table, second reference not at hand).
WASHER_ISO7089 = {
    "M4": {"d1": 4.3, "d2": 9.0, "h": 0.8},
    "M5": {"d1": 5.3, "d2": 10.0, "h": 1.0},
    "M6": {"d1": 6.4, "d2": 12.0, "h": 1.6},
    "M8": {"d1": 8.4, "d2": 16.0, "h": 1.6},
    "M10": {"d1": 10.5, "d2": 20.0, "h": 2.0},
    "M12": {"d1": 13.0, "d2": 24.0, "h": 2.5},
}

# ISO 261 metric coarse pitch P and the nominal (major) diameter d.
COARSE_PITCH_ISO261 = {
    "M6": {"d": 6.0, "P": 1.0},
    "M8": {"d": 8.0, "P": 1.25},
    "M10": {"d": 10.0, "P": 1.5},
}

# ISO 15 deep-groove ball bearings: bore d, outside diameter D, width B.
BEARING_ISO15 = {
    "6000": {"d": 10.0, "D": 26.0, "B": 8.0},
    "6001": {"d": 12.0, "D": 28.0, "B": 8.0},
    "6002": {"d": 15.0, "D": 32.0, "B": 9.0},
    "6003": {"d": 17.0, "D": 35.0, "B": 10.0},
    "6004": {"d": 20.0, "D": 42.0, "B": 12.0},
    "6005": {"d": 25.0, "D": 47.0, "B": 12.0},
    "6200": {"d": 10.0, "D": 30.0, "B": 9.0},
    "6201": {"d": 12.0, "D": 32.0, "B": 10.0},
    "6202": {"d": 15.0, "D": 35.0, "B": 11.0},
    "6203": {"d": 17.0, "D": 40.0, "B": 12.0},
    "6204": {"d": 20.0, "D": 47.0, "B": 14.0},
    "6205": {"d": 25.0, "D": 52.0, "B": 15.0},
}

# ISO 54 preferred modules (first series, the small end used here).
GEAR_MODULES_ISO54 = (1.0, 1.25, 1.5, 2.0, 2.5, 3.0)
