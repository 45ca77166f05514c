"""Files in and out: image stacks, text inputs, TOML with line numbers, atomic writes.

Holds TIFF / OME-TIFF stacks (``stacks``), the one reader for text inputs (``text``), TOML
parsing that keeps line numbers (``tomlsource``), atomic writes (``atomic``) and the named
result table with its pandas DataFrame (``tables``).
It may import only :mod:`probeplan.errors` and :mod:`probeplan.units`.
"""

__all__: list[str] = []
