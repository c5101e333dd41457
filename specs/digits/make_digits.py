"""Write scikit-learn's bundled 8×8 handwritten digits as ``digits.npz`` beside this script.

The data ships inside scikit-learn (``sklearn.datasets.load_digits``: 1797 images, grey levels
0–16, ten classes; the UCI "Optical Recognition of Handwritten Digits" test set), so lesion keeps
no copy of it: run this once, then ``lesion run specs/digits/digits-conv.toml``.

    .venv/bin/python specs/digits/make_digits.py

``x`` is ``[1797, 8, 8, 1]`` (height, width, one channel: the shape a convolutional network
reads from the array itself), ``y`` the digit.
"""

from __future__ import annotations

import pathlib
import sys

import numpy as np


def write_digits(path: pathlib.Path) -> pathlib.Path:
    from sklearn.datasets import load_digits

    digits = load_digits()
    x = digits.images.astype(np.float32)[..., None]
    np.savez(path, x=x, y=digits.target.astype(np.int64))
    return path


if __name__ == "__main__":
    out = write_digits(pathlib.Path(sys.argv[1]) if len(sys.argv) > 1 else pathlib.Path(__file__).with_name("digits.npz"))
    print(f"wrote {out}")
