"""The bundled demo frames: where they are, and how they are made.

The frames in ``demo_images/`` come from the virtual bench
(:mod:`benchspec.simulate`) with ``demo_images/bench.toml`` and the recipe
``demo_images/recipe.toml``; :func:`regenerate` makes them again, pixel for pixel.
"""

from __future__ import annotations

import functools
from dataclasses import dataclass
from importlib import resources
from pathlib import Path

from . import simulate
from .errors import FileFormatError

try:  # Python 3.11+
    import tomllib
except ModuleNotFoundError:  # pragma: no cover
    import tomli as tomllib

__all__ = ["DemoFrame", "demo_folder", "demo_frames", "demo_bench", "regenerate", "render_demo_frame"]

_PACKAGE = "benchspec.demo_images"


@dataclass(frozen=True)
class DemoFrame:
    """One demo frame of the recipe."""

    file: str
    source: str
    seed: int
    label: str
    overrides: tuple[tuple[str, object], ...] = ()
    same_exposure_as: str | None = None

    @property
    def path(self) -> Path:
        return demo_folder() / self.file


def demo_folder() -> Path:
    """The folder holding the packaged demo frames."""
    return Path(str(resources.files(_PACKAGE)))


def _read(name: str) -> str:
    try:
        return (resources.files(_PACKAGE) / name).read_text(encoding="utf-8")
    except FileNotFoundError:
        raise FileFormatError(f"demo file {name} is missing from the installation; reinstall benchspec") from None


@functools.lru_cache(maxsize=None)
def demo_bench() -> simulate.Bench:
    """The invented demo bench (``demo_images/bench.toml``)."""
    return simulate.bench_from_dict(tomllib.loads(_read("bench.toml")))


@functools.lru_cache(maxsize=None)
def demo_frames() -> tuple[DemoFrame, ...]:
    """Every frame of the recipe, in order."""
    recipe = tomllib.loads(_read("recipe.toml"))
    return tuple(
        DemoFrame(
            file=item["file"],
            source=item["source"],
            seed=int(item["seed"]),
            label=item.get("label", ""),
            overrides=tuple(sorted(item.get("set", {}).items())),
            same_exposure_as=item.get("same_exposure_as"),
        )
        for item in recipe["frame"]
    )


def _bench_for(frame: DemoFrame, scales: dict[str, float]) -> simulate.Bench:
    bench = demo_bench().with_(source=frame.source)
    for key, value in frame.overrides:
        section, _, name = key.partition(".")
        bench = bench.with_(**{section: {name: value}})
    if frame.same_exposure_as:
        bench = bench.with_(exposure={"scale_dn": scales[frame.same_exposure_as]})
    return bench


def render_demo_frame(name: str) -> simulate.Rendered:
    """Render one demo frame by file name (``"tube_A.png"``), exactly as shipped."""
    by_name = {frame.file: frame for frame in demo_frames()}
    if name not in by_name:
        raise FileFormatError(f"no demo frame named {name!r}; see demo_images/README.md")
    chain = [by_name[name]]
    while chain[-1].same_exposure_as:
        chain.append(by_name[chain[-1].same_exposure_as])
    scales: dict[str, float] = {}
    for frame in reversed(chain):
        rendered = simulate.render(_bench_for(frame, scales), seed=frame.seed)
        scales[frame.file] = rendered.truth["exposure"]["scale_dn"]
    return rendered


def regenerate(out_dir: str | Path, *, force: bool = False) -> list[Path]:
    """Write every demo frame and its truth sidecar into ``out_dir``; returns the frame paths."""
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    scales: dict[str, float] = {}
    written = []
    for frame in demo_frames():
        bench = _bench_for(frame, scales)
        rendered = simulate.render(bench, seed=frame.seed)
        scales[frame.file] = rendered.truth["exposure"]["scale_dn"]
        target = out / frame.file
        simulate.write_frame(rendered, target, bench=bench, force=force)
        truth = dict(rendered.truth, label=frame.label)
        simulate.write_truth(truth, target.with_name(target.stem + ".truth.json"), force=force)
        written.append(target)
    return written
