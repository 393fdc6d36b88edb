"""twin.bench: the shipped benchmarks (``twin bench WHAT``), one module each."""

from pathlib import Path

#: The demo plant file every benchmark defaults to (found from the package, not the working directory).
DEFAULT_CONFIG = Path(__file__).resolve().parents[2] / "configs" / "demo-u1.toml"
