"""The config sections `config.py` assembles into the root `Config`, one module per subject.

Plain pydantic models and the pure checks they run as the file loads. They import only the
standard library, pydantic and the lowest-level aftercast modules, never a stage package nor
`config.py`, so every stage can import its section without an import cycle: arrows run from the
stages down to the config, and from the config down to here.
"""
