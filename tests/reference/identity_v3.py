"""Expected row identities of version 3 (src/data/identity.rs), in Python 3 with the standard
library only (hashlib, struct, math, decimal). Written and run with Python 3.11.7.

An independent re-implementation of the definition in the module documentation of
src/data/identity.rs: it finds a number's decade by a search over the powers of ten instead of
the binary exponent, and writes the cells' bytes with struct. It prints one line per case,
`label hex`, and the unit tests in src/data/identity.rs pin these values.
Run: python3 identity_v3.py
"""

import hashlib
import math
import struct
import sys
from decimal import Decimal

# P(j): the double nearest 10^j, as the Rust side reads "1e{j}".
P = {j: float(f"1e{j}") for j in range(-330, 331)}
ASCII_WS = " \t\n\r\x0c"  # Rust's u8::is_ascii_whitespace (no vertical tab)


def number_cell(x):
    """0x01, m (i64 LE), d (i16 LE); or 0x03 and the double's bits for the fallback."""
    if x == 0.0:
        return b"\x01" + struct.pack("<qh", 0, 0)
    a = abs(x)
    if a < sys.float_info.min or not math.isfinite(a):
        return b"\x03" + struct.pack("<d", x)
    # The largest j with P(j) <= |x|: P(-330) is 0.0 and P(330) is infinite.
    d = max(j for j in range(-330, 330) if P[j] <= a)
    if d < -299 or d > 300:
        return b"\x03" + struct.pack("<d", x)
    k = 9 - d
    v = a * P[k] if k >= 0 else a / P[-k]
    m = math.floor(v + 0.5)
    if m >= 10**10:
        m, d = 10**9, d + 1
    if x < 0:
        m = -m
    return b"\x01" + struct.pack("<qh", m, d)


def text_cell(s):
    """A text cell; the cases below use number spellings Rust's str::parse and float() read alike."""
    t = s.strip(ASCII_WS)
    if t == "":
        return b"\x00"
    try:
        x = float(t)
    except ValueError:
        x = None
    if x is not None and math.isfinite(x):
        return number_cell(x)
    b = t.encode()
    return b"\x02" + struct.pack("<Q", len(b)) + b


MISSING = object()


def row_id(cells):
    """cells: {column name: float, str or MISSING}, every recipe column of one row."""
    names = sorted(cells, key=lambda n: n.encode())
    h = hashlib.sha256(b"probity-row-v3\0")
    for n in names:
        b = n.encode()
        h.update(struct.pack("<Q", len(b)) + b)
    for n in names:
        c = cells[n]
        if c is MISSING or (isinstance(c, float) and math.isnan(c)):
            h.update(b"\x00")
        elif isinstance(c, float):
            h.update(number_cell(c))
        else:
            h.update(text_cell(c))
    return h.digest()[:16].hex()


def labelled_id(cells, target):
    """A row with its target: the feature identity's 16 bytes, then the target cell."""
    h = hashlib.sha256(b"probity-labelled-v3\0" + bytes.fromhex(row_id(cells)))
    if target is MISSING or (isinstance(target, float) and math.isnan(target)):
        h.update(b"\x00")
    elif isinstance(target, float):
        h.update(number_cell(target))
    else:
        h.update(text_cell(target))
    return h.digest()[:16].hex()


def shortest_plain(x):
    """A number as probity's display_f64 writes it: shortest round-trip digits, plain notation."""
    s = format(Decimal(repr(x)), "f")
    if "." in s:
        s = s.rstrip("0").rstrip(".")
    return s


def key_id(cell):
    if isinstance(cell, float):
        text = shortest_plain(cell)
    else:
        text = cell.strip(ASCII_WS).lower()
    return hashlib.sha256(b"probity-key-v3\0" + text.encode()).digest()[:16].hex()


# The pinned table: recipe columns Weight, colour, size (byte order puts 'W' first).
ROWS = [
    {"size": 12.87, "colour": "red", "Weight": -0.5},
    {"size": MISSING, "colour": " Light Blue ", "Weight": 0.0},
    {"size": -0.0, "colour": " 3.50 ", "Weight": 9.9999999999},
    {"size": 1e-310, "colour": MISSING, "Weight": 1e305},
    {"size": 1e-300, "colour": "   ", "Weight": 123456789012.0},
    {"size": 2.0 / 3.0, "colour": "1e3", "Weight": 1.5e-299},
]

CASES = [(f"row{i}", row_id(r)) for i, r in enumerate(ROWS)]
# The same rows with a text column that holds the numbers 3.5 and 1000 as numbers.
CASES.append(("row2_number_colour", row_id({**ROWS[2], "colour": 3.5})))
CASES.append(("row5_number_colour", row_id({**ROWS[5], "colour": 1000.0})))
# Rows 0 to 2 labelled with a number, a text and a missing target.
LABELS = [151.0 + 1e-12, " yes ", MISSING]
CASES += [(f"labelled{i}", labelled_id(ROWS[i], t)) for i, t in enumerate(LABELS)]
KEYS = [" AbC Def ", "\u00c4B", 1234.5, 1e21, -0.0, 7.0, 1e-7]
CASES += [(f"key{i}", key_id(k)) for i, k in enumerate(KEYS)]

if __name__ == "__main__":
    # The canonical forms the unit tests work by hand, as a cross-check of the arithmetic.
    for x in [12.87, 9.9999999999, 2.0 / 3.0, 123456789012.0, 0.1, -0.5]:
        m, d = struct.unpack("<qh", number_cell(x)[1:])
        print(f"# {x!r}: m={m} d={d}")
    for label, hexed in CASES:
        print(label, hexed)
