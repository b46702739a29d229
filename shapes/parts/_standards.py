"""Dimension tables from published standards (mm).

Each table names its standard and the table it copies. Rows read from the standard's table carry no
mark; rows recalled rather than read are marked ``# from memory``. tests/test_parts.py checks the
generated parts against the same values, and re-checks recalled ones against a closed form where
one exists (e.g. a hexagon's across-corners width from its across-flats width)."""

from __future__ import annotations

__all__ = [
    "HEX_NUT_ISO4032", "WASHER_ISO7089", "WASHER_CHAMFER_ISO7090", "COARSE_PITCH_ISO261", "BEARING_ISO15",
    "GEAR_MODULES_ISO54", "CLEARANCE_HOLE_ISO273", "VBELT_GROOVE_ISO4183",
]

# ISO 4032 (hexagon regular nuts, style 1), table of dimensions: across flats s, height m (max).
# M6/M8/M10 from that table; the other rows from memory.
HEX_NUT_ISO4032 = {
    "M5": {"s": 8.0, "m": 4.7},  # from memory (ISO 4032)
    "M6": {"s": 10.0, "m": 5.2},
    "M8": {"s": 13.0, "m": 6.8},
    "M10": {"s": 16.0, "m": 8.4},
    "M12": {"s": 18.0, "m": 10.8},  # from memory (ISO 4032)
    "M14": {"s": 21.0, "m": 12.8},  # from memory (ISO 4032)
    "M16": {"s": 24.0, "m": 14.8},  # from memory (ISO 4032)
}

# ISO 7089 (plain washers, normal series), table of dimensions: hole d1 (min), outside d2 (max),
# thickness h (nominal). M6/M8/M10 from that table; the other rows from memory.
WASHER_ISO7089 = {
    "M4": {"d1": 4.3, "d2": 9.0, "h": 0.8},  # from memory (ISO 7089)
    "M5": {"d1": 5.3, "d2": 10.0, "h": 1.0},  # from memory (ISO 7089)
    "M6": {"d1": 6.4, "d2": 12.0, "h": 1.6},
    "M8": {"d1": 8.4, "d2": 16.0, "h": 1.6},
    "M10": {"d1": 10.5, "d2": 20.0, "h": 2.0},
    "M12": {"d1": 13.0, "d2": 24.0, "h": 2.5},  # from memory (ISO 7089)
    "M14": {"d1": 15.0, "d2": 28.0, "h": 2.5},  # from memory (ISO 7089)
    "M16": {"d1": 17.0, "d2": 30.0, "h": 3.0},  # from memory (ISO 7089)
}

# ISO 7090, the chamfered version of the ISO 7089 washer (same d1, d2, h, sizes M5 and up): the
# outside edge of one face is chamfered at 30 degrees to the face, leaving between h/4 and h/2
# of the rim square; we leave the middle of that span, 3h/8. From memory (ISO 7090).
WASHER_CHAMFER_ISO7090 = {"deg": 30.0, "rim": 0.375, "from": "M5"}

# ISO 261 (ISO general-purpose metric screw threads), table of diameter/pitch combinations: the
# coarse pitch P of each nominal (major) diameter d. M6/M8/M10 from that table; the rest from memory.
COARSE_PITCH_ISO261 = {
    "M5": {"d": 5.0, "P": 0.8},  # from memory (ISO 261)
    "M6": {"d": 6.0, "P": 1.0},
    "M8": {"d": 8.0, "P": 1.25},
    "M10": {"d": 10.0, "P": 1.5},
    "M12": {"d": 12.0, "P": 1.75},  # from memory (ISO 261)
    "M14": {"d": 14.0, "P": 2.0},  # from memory (ISO 261)
    "M16": {"d": 16.0, "P": 2.0},  # from memory (ISO 261)
}

# ISO 15 (radial bearings, boundary dimensions), tables of diameter series 0 (60xx, dimension series 10)
# and 2 (62xx, dimension series 02): bore d, outside diameter D, width B.
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

# ISO 273 clearance holes for bolts, medium series. From memory (ISO 273).
CLEARANCE_HOLE_ISO273 = {"M3": 3.4, "M4": 4.5, "M5": 5.5, "M6": 6.6, "M8": 9.0, "M10": 11.0, "M12": 13.5, "M16": 17.5}

# ISO 4183 grooves for narrow V-belts: groove width at the rim b1, height of the rim above the
# datum line c, depth below the datum line t; groove angle 34 degrees up to the datum diameter
# `d_34`, 38 degrees above. From memory (ISO 4183).
VBELT_GROOVE_ISO4183 = {
    "SPZ": {"b1": 9.7, "c": 2.0, "t": 9.0, "d_34": 80.0},
    "SPA": {"b1": 12.7, "c": 2.75, "t": 11.0, "d_34": 118.0},
}
