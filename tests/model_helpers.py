"""Shared helpers for model tests: load a plant file from text, solve demo-u1 once."""

from __future__ import annotations

import functools
from pathlib import Path

from twin.config import PlantConfig, load_config
from twin.model.flowsheet import Flowsheet
from twin.model.solve import HeatBalance, Operation, solve_design

ROOT = Path(__file__).resolve().parent.parent
DEMO = ROOT / "configs" / "demo-u1.toml"


def config_from_text(tmp_path: Path, text: str, name: str = "plant.toml") -> PlantConfig:
    path = tmp_path / name
    path.write_text(text)
    return load_config(path)


@functools.lru_cache(maxsize=1)
def demo_config() -> PlantConfig:
    return load_config(DEMO)


@functools.lru_cache(maxsize=1)
def demo_design() -> tuple[Flowsheet, Operation, HeatBalance]:
    cfg = demo_config()
    fs = Flowsheet.from_config(cfg)
    op = Operation.from_config(cfg)
    return fs, op, solve_design(fs, op)
