"""The spec compiler: TOML spec -> validated study -> variants -> pure JAX training programs."""
