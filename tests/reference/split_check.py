"""Independent check of probity's seeded draws, in Python 3 with the standard library only.

Re-implements the ChaCha20 block function (RFC 8439, section 2.3), rand_chacha's word layout
(64-bit block counter in state words 12-13, 64-bit stream id in words 14-15, next_u64 = low word
then high word), Lemire's unbiased bounded draw and the top-down Fisher-Yates shuffle, then
asserts the values pinned in src/split/rng.rs and src/split/tests.rs. Run: python3 split_check.py
"""

import struct

MASK = 0xFFFFFFFF


def rotl(x, n):
    return ((x << n) | (x >> (32 - n))) & MASK


def quarter(s, a, b, c, d):
    s[a] = (s[a] + s[b]) & MASK; s[d] = rotl(s[d] ^ s[a], 16)
    s[c] = (s[c] + s[d]) & MASK; s[b] = rotl(s[b] ^ s[c], 12)
    s[a] = (s[a] + s[b]) & MASK; s[d] = rotl(s[d] ^ s[a], 8)
    s[c] = (s[c] + s[d]) & MASK; s[b] = rotl(s[b] ^ s[c], 7)


def block(key, counter, stream):
    k = struct.unpack("<8I", key)
    st = [0x61707865, 0x3320646E, 0x79622D32, 0x6B206574, *k,
          counter & MASK, counter >> 32, stream & MASK, stream >> 32]
    w = st[:]
    for _ in range(10):
        quarter(w, 0, 4, 8, 12); quarter(w, 1, 5, 9, 13); quarter(w, 2, 6, 10, 14); quarter(w, 3, 7, 11, 15)
        quarter(w, 0, 5, 10, 15); quarter(w, 1, 6, 11, 12); quarter(w, 2, 7, 8, 13); quarter(w, 3, 4, 9, 14)
    return [(a + b) & MASK for a, b in zip(w, st)]


class Stream:
    def __init__(self, seed, domain, index):
        self.key = struct.pack("<Q", seed) + bytes(24)
        self.stream = (domain << 32) | index
        self.counter = 0
        self.words = []

    def u32(self):
        if not self.words:
            self.words = block(self.key, self.counter, self.stream)
            self.counter += 1
        return self.words.pop(0)

    def u64(self):
        lo = self.u32()
        hi = self.u32()
        return (hi << 32) | lo


def bounded(rng, n):
    m = rng.u64() * n
    low = m & 0xFFFFFFFFFFFFFFFF
    if low < n:
        t = (2**64 - n) % n
        while low < t:
            m = rng.u64() * n
            low = m & 0xFFFFFFFFFFFFFFFF
    return m >> 64


def shuffle(rng, items):
    for i in range(len(items) - 1, 0, -1):
        j = bounded(rng, i + 1)
        items[i], items[j] = items[j], items[i]


PARTITION, FOLDS, CANDIDATE = 1, 2, 3

# RFC 8439 2.3.2 test vector, through the rand_chacha layout.
rfc = block(bytes(range(32)), (0x09000000 << 32) | 1, 0x4A000000)
assert rfc[0] == 0xE4E7F110 and rfc[15] == 0x4E3C50A2, [hex(w) for w in rfc]

# RFC 8439 appendix A.1 test vector #1: all-zero key and nonce, counter 0.
zero = struct.pack("<16I", *block(bytes(32), 0, 0)).hex()
assert zero == ("76b8e0ada0f13d90405d6ae55386bd28bdd219b8a08ded1aa836efcc8b770dc7"
                "da41597c5157488d7724e03fb8d84a376a43b8f41518a11cc387b669b2ee6586"), zero

# src/split/rng.rs pins.
v = list(range(12))
shuffle(Stream(42, PARTITION, 0), v)
assert v == [5, 6, 2, 4, 9, 10, 1, 7, 11, 3, 8, 0], v
assert Stream(42, CANDIDATE, 3).u64() == 8204392660967152638

# src/split/tests.rs: random split of 20 rows, test = 0.25, 3 folds, seed 2026.
n, seed = 20, 2026
order = list(range(n))
shuffle(Stream(seed, PARTITION, 0), order)
parts = ["r"] * n
for pos, row in enumerate(order[: round(0.25 * n)]):
    parts[row] = "t"
assert "".join(parts) == "rrtrttrrrrrrrrttrrrr", "".join(parts)
dev = [i for i in range(n) if parts[i] != "t"]
perm = list(range(len(dev)))
shuffle(Stream(seed, FOLDS, 0), perm)
k = 3
size0 = len(dev) // k + (1 if 0 < len(dev) % k else 0)
fold0 = sorted(dev[p] for p in perm[:size0])
assert fold0 == [0, 6, 8, 16, 17], fold0
print("split_check: ChaCha20 (RFC 8439 vectors), bounded draw, shuffle and pinned partitions agree")
