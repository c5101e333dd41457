"""Settings for the whole suite."""


def pytest_configure(config):
    # Tests compute runs in this process as `lesion run` does, with XLA:CPU's one-thread pool
    # (its size decides the bits of large reductions), whichever test first touches jax.
    from runtime.environment import single_threaded_xla

    single_threaded_xla()
