"""Expected row identities and development fingerprints of version 3 (src/data/identity.rs), in
Python 3 with the standard library only (hashlib, struct, math, decimal). Written and run with
Python 3.11.7.

An independent re-implementation of the definition in the module documentation of
src/data/identity.rs: it finds a number's decade by a search over the powers of ten instead of
the binary exponent, writes the cells' bytes with struct, and takes a fingerprint's words from
those bytes. It prints one line per case, `label hex`, and the unit tests in
src/data/identity/tests.rs pin these values.
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
    """A text cell; the cases below use number spellings Rust's str::parse and float() read alike,
    and text whose str.lower() equals Rust's str::to_lowercase."""
    t = s.strip(ASCII_WS)
    if t == "":
        return b"\x00"
    try:
        x = float(t)
    except ValueError:
        x = None
    if x is not None and math.isfinite(x):
        return number_cell(x)
    b = t.lower().encode()
    return b"\x02" + struct.pack("<Q", len(b)) + b


MISSING = object()


def cell(c):
    """The bytes of a cell: a float (NaN is missing), a str or MISSING."""
    if c is MISSING or (isinstance(c, float) and math.isnan(c)):
        return b"\x00"
    if isinstance(c, float):
        return number_cell(c)
    return text_cell(c)


def normalise(name):
    return name.strip(ASCII_WS).lower()


def recipe(cells):
    """The recipe's (normalised name, cell) pairs in byte order of the names, from
    {column name as in the table: cell}, every recipe column of one row."""
    named = {normalise(n): c for n, c in cells.items()}
    assert len(named) == len(cells), "two columns normalise alike"
    return sorted(named.items(), key=lambda nc: nc[0].encode())


def row_id(cells):
    h = hashlib.sha256(b"probity-row-v3\0")
    for n, _ in recipe(cells):
        b = n.encode()
        h.update(struct.pack("<Q", len(b)) + b)
    for _, c in recipe(cells):
        h.update(cell(c))
    return h.digest()[:16].hex()


def labelled_id(cells, target):
    """A row with its target: the feature identity's 16 bytes, then the target cell."""
    h = hashlib.sha256(b"probity-labelled-v3\0" + bytes.fromhex(row_id(cells)))
    h.update(cell(target))
    return h.digest()[:16].hex()


M64 = (1 << 64) - 1


def fmix64(x):
    """MurmurHash3's 64-bit finalizer (Austin Appleby, public domain)."""
    x ^= x >> 33
    x = (x * 0xFF51AFD7ED558CCD) & M64
    x ^= x >> 33
    x = (x * 0xC4CEB9FE1A85EC53) & M64
    return x ^ (x >> 33)


def fnv1a64(b):
    h = 0xCBF29CE484222325
    for byte in b:
        h = ((h ^ byte) * 0x100000001B3) & M64
    return h


def word(c):
    """A cell's fingerprint word, read back from the cell's bytes."""
    b = cell(c)
    if b[0] == 0:
        return 0
    if b[0] == 1:
        m, d = struct.unpack("<qh", b[1:])
        return (1 << 62) | (((d + 512) & 0x3FF) << 40) | (m & 0xFFFFFFFFFF)
    if b[0] == 3:
        (bits,) = struct.unpack("<Q", b[1:])
        return (3 << 62) ^ fmix64(bits)
    return (2 << 62) | (fnv1a64(b[9:]) >> 2)


def fingerprint(cells, target):
    """A development fingerprint: the recipe's cells in its order, then the target."""
    h = 0x6A09E667F3BCC908
    words = [word(c) for _, c in recipe(cells)] + [word(target)]
    for w in words:
        h = fmix64(h ^ w)
    return f"{fmix64(h ^ len(words)):016x}"


def shortest_plain(x):
    """A number as probity's display_f64 writes it: shortest round-trip digits, plain notation."""
    s = format(Decimal(repr(x)), "f")
    if "." in s:
        s = s.rstrip("0").rstrip(".")
    return s


def key_text(c):
    if isinstance(c, float):
        return shortest_plain(c)
    return c.strip(ASCII_WS).lower()


def key_id(c):
    return hashlib.sha256(b"probity-key-v3\0" + key_text(c).encode()).digest()[:16].hex()


def key_fingerprint(c):
    return f"{fmix64(fnv1a64(key_text(c).encode())):016x}"


# The pinned table: the columns " Size ", "colour" and "Weight", whose normalised names
# colour, size, weight are the recipe in byte order; its "target" column holds 1 to 6.
ROWS = [
    {" Size ": 12.87, "colour": "red", "Weight": -0.5},
    {" Size ": MISSING, "colour": " Light Blue ", "Weight": 0.0},
    {" Size ": -0.0, "colour": " 3.50 ", "Weight": 9.9999999999},
    {" Size ": 1e-310, "colour": MISSING, "Weight": 1e305},
    {" Size ": 1e-300, "colour": "   ", "Weight": 123456789012.0},
    {" Size ": 2.0 / 3.0, "colour": "1e3", "Weight": 1.5e-299},
]
TARGETS = [1.0, 2.0, 3.0, 4.0, 5.0, 6.0]

CASES = [(f"row{i}", row_id(r)) for i, r in enumerate(ROWS)]
# The same rows with a text column that holds the numbers 3.5 and 1000 as numbers.
CASES.append(("row2_number_colour", row_id({**ROWS[2], "colour": 3.5})))
CASES.append(("row5_number_colour", row_id({**ROWS[5], "colour": 1000.0})))
# Rows 0 to 2 labelled with a number, a text with capitals and spaces, and a missing target.
LABELS = [151.0 + 1e-12, " Yes ", MISSING]
CASES += [(f"labelled{i}", labelled_id(ROWS[i], t)) for i, t in enumerate(LABELS)]
KEYS = [" AbC Def ", "\u00c4B", 1234.5, 1e21, -0.0, 7.0, 1e-7]
CASES += [(f"key{i}", key_id(k)) for i, k in enumerate(KEYS)]
# Development fingerprints: every row with its target, rows 0 to 2 with the labels above.
CASES += [(f"fingerprint{i}", fingerprint(r, t)) for i, (r, t) in enumerate(zip(ROWS, TARGETS))]
CASES += [(f"fingerprint_labelled{i}", fingerprint(ROWS[i], t)) for i, t in enumerate(LABELS)]
CASES += [(f"key_fingerprint{i}", key_fingerprint(k)) for i, k in enumerate(KEYS)]

if __name__ == "__main__":
    # The canonical forms the unit tests work by hand, as a cross-check of the arithmetic.
    for x in [12.87, 9.9999999999, 2.0 / 3.0, 123456789012.0, 0.1, -0.5]:
        m, d = struct.unpack("<qh", number_cell(x)[1:])
        print(f"# {x!r}: m={m} d={d}")
    for label, hexed in CASES:
        print(label, hexed)
