"""Arrow columns assembled from buffers equal what pyarrow's own converter builds, and writing a
result set never imports pandas."""

import subprocess
import sys

import numpy as np
import pyarrow as pa
import pytest

from runtime.store import column

CASES = [
    ([1, None, 3], pa.int32()),
    ([1, 2**40, None], pa.int64()),
    ([1.5, float("nan"), None, -0.0], pa.float64()),
    ([0.1, 2.5], pa.float32()),
    (np.array([0.1, np.nan, -0.0], np.float32), pa.float32()),
    (["a", None, "é€", ""], pa.string()),
    ([True, None, False, True, True, False, False, True, True], pa.bool_()),  # > 8: two bitmap bytes
    ([], pa.string()),
    ([None, None], pa.int64()),
]


@pytest.mark.parametrize("values, typ", CASES, ids=[f"{t}-{i}" for i, (_, t) in enumerate(CASES)])
def test_column_equals_pyarrow_array(values, typ):
    built = column(values, typ)
    built.validate(full=True)
    reference = pa.array(list(values), type=typ)  # pyarrow's converter is the reference
    assert built.type == typ and built.null_count == reference.null_count
    assert built.equals(reference) or all(
        (a is None and b is None) or (a == b) or (a != a and b != b)  # NaN never equals itself
        for a, b in zip(built.to_pylist(), reference.to_pylist()))
    if typ in (pa.float32(), pa.float64()):  # -0.0 keeps its sign
        got = np.asarray([np.nan if v is None else v for v in built.to_pylist()])
        ref = np.asarray([np.nan if v is None else v for v in reference.to_pylist()])
        np.testing.assert_array_equal(np.signbit(got), np.signbit(ref))


def test_running_a_study_imports_no_pandas(tmp_path, tiny_spec):
    spec = tiny_spec(tmp_path, "quiet", seeds=2, epochs=2)
    code = ("import sys; from runtime.cli import main; sys.argv = ['lesion', 'run', sys.argv[1], '--quiet', "
            "'--results', sys.argv[2]]\ntry:\n    main()\nexcept SystemExit as e:\n    assert not e.code, e.code\n"
            "assert 'pandas' not in sys.modules, 'pandas was imported'")
    done = subprocess.run([sys.executable, "-c", code, str(spec), str(tmp_path / "r")], capture_output=True,
                          text=True, timeout=300)
    assert done.returncode == 0, done.stderr[-2000:]
