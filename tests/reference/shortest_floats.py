"""Writes tests/data/shortest_floats.model.json and tests/data/shortest_floats.bits.txt.

Outside reference for correctly rounded JSON parsing: Python's float repr (used by json.dumps) is the
shortest decimal string that reads back to the same double (Python documentation, "Floating Point
Arithmetic: Issues and Limitations", and the repr change of Python 3.1). The model holds 3000 doubles
drawn from random 64-bit patterns (finite ones only, so every exponent, sign and subnormals occur) and
3000 doubles with uniformly random decimal significands of 15 to 17 digits; the bits file lists the
exact 64-bit pattern of each, in the order of the model's single weight row, then the bias.

Standard library only; deterministic (random.Random(20240611)).
"""

import json
import math
import random
import struct
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]


def bits(x: float) -> str:
    return format(struct.unpack("<Q", struct.pack("<d", x))[0], "016x")


def main() -> None:
    rng = random.Random(20240611)
    values = []
    while len(values) < 3000:
        x = struct.unpack("<d", struct.pack("<Q", rng.getrandbits(64)))[0]
        if math.isfinite(x):
            values.append(x)
    while len(values) < 6000:
        digits = rng.randint(15, 17)
        mantissa = rng.randrange(10 ** (digits - 1), 10**digits)
        exponent = rng.randint(-30, 30)
        x = float(f"{mantissa}e{exponent}")
        values.append(-x if rng.random() < 0.5 else x)
    bias = values.pop()
    model = {
        "format": "ballast.model/1",
        "name": "shortest-floats",
        "input": {"dim": len(values)},
        "layers": [{"kind": "dense", "weights": [values], "bias": [bias]}],
        "provenance": {"made_by": "tests/reference/shortest_floats.py (Python float repr)"},
    }
    (ROOT / "tests/data/shortest_floats.model.json").write_text(json.dumps(model) + "\n")
    lines = [bits(v) for v in values] + [bits(bias)]
    (ROOT / "tests/data/shortest_floats.bits.txt").write_text("\n".join(lines) + "\n")


if __name__ == "__main__":
    main()
