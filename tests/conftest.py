"""Settings for the whole suite."""

import os


def pytest_configure(config):
    # Tests compute runs in this process as `lesion run` does, with XLA:CPU's one-thread pool
    # (its size decides the bits of large reductions), whichever test first touches jax.
    from runtime.environment import single_threaded_xla

    single_threaded_xla()
    # The command-line tests read the layout of piped output, which has no width unless COLUMNS
    # says one. GNU readline, which pytest loads, exports COLUMNS=80 and LINES=24 into the
    # process's environment (measured: a pytest-xdist worker inherits them, a subprocess too);
    # a test that wants a width passes COLUMNS itself. unsetenv too: os.environ may not know them.
    for name in ("COLUMNS", "LINES"):
        os.environ.pop(name, None)
        os.unsetenv(name)
