"""Type stubs of the posgrid package (the functions live in the native module)."""

import os
from typing import Any, Dict, List, Literal, Optional, Sequence, Tuple, TypedDict, Union

import numpy as np
import numpy.typing as npt

__version__: str
core_version: str

PathArg = Union[str, "os.PathLike[str]"]
Sides = Union[int, Tuple[int, ...], List[int], str]
Plane = Union[int, Tuple[int, int], List[int], str]
Size = Union[int, str]
Names = Union[str, Sequence[str]]
Kernel = Literal["nearest", "bilinear", "bicubic", "lanczos3", "area"]
Coords = Literal["half-pixel", "align-corners"]
Edges = Literal["clamp", "renormalize"]
Antialias = Literal["off", "on", "auto"]
Channels = Literal["first", "last"]
Relative = Literal["kernel", "geometric"]
Format = Literal["safetensors", "npz", "pytorch"]
FloatArray = Union[npt.NDArray[np.float32], npt.NDArray[np.float64]]

class Error(Exception):
    exit_code: int
    message: str
    path: Optional[str]
    def __init__(
        self, message: str, path: Optional[str] = None, exit_code: Optional[int] = None
    ) -> None: ...

class UsageError(Error, ValueError): ...
class InvalidInputError(Error): ...
class TableError(Error): ...
class WriteError(Error): ...
class RefusedError(Error): ...

class Similarity(TypedDict):
    maps: npt.NDArray[np.float32]
    ref_rows: List[int]
    ref_cols: List[int]
    profile_distance: npt.NDArray[np.float64]
    profile_mean: npt.NDArray[np.float64]
    note: Optional[str]

class Fidelity(TypedDict):
    score: Optional[float]
    min: Optional[float]
    worst: Optional[Tuple[int, int]]
    refs: Tuple[int, int]
    undefined: int
    note: Optional[str]

def scan(
    path: PathArg,
    *,
    source_grid: Optional[Sides] = None,
    slots: Optional[int] = None,
    patch: Optional[int] = None,
    tensors: Optional[Names] = None,
    channels: Optional[Channels] = None,
) -> Dict[str, Any]: ...
def resize(
    path: PathArg,
    out: PathArg,
    *,
    grid: Optional[Sides] = None,
    image: Optional[Plane] = None,
    scale: Optional[Union[float, str, Tuple[float, float]]] = None,
    frames: Optional[int] = None,
    window: Optional[Plane] = None,
    new_patch: Optional[Plane] = None,
    patch_order: Optional[Literal["cyx", "yxc"]] = None,
    source_grid: Optional[Sides] = None,
    slots: Optional[int] = None,
    patch: Optional[int] = None,
    tensors: Optional[Names] = None,
    channels: Optional[Channels] = None,
    kernel: Kernel = "bicubic",
    coords: Coords = "half-pixel",
    edges: Edges = "clamp",
    antialias: Antialias = "auto",
    cubic_a: float = -0.75,
    relative: Relative = "kernel",
    rebuild_sincos: bool = False,
    allow_nonfinite: bool = False,
    dry_run: bool = False,
    force: bool = False,
    sync: bool = True,
    format: Optional[Format] = None,
    state_dict: Optional[str] = None,
    strip_prefix: Optional[str] = None,
    model_only: bool = False,
    keep_config: bool = False,
    map: Optional[PathArg] = None,
    refs: int = 16,
    memory_limit: Size = "4G",
) -> Dict[str, Any]: ...
def resample(
    table: FloatArray,
    to: Sides,
    *,
    slots: int = 0,
    source_grid: Optional[Sides] = None,
    kernel: Kernel = "bicubic",
    coords: Coords = "half-pixel",
    edges: Edges = "clamp",
    antialias: Antialias = "auto",
    cubic_a: float = -0.75,
    memory_limit: Size = "4G",
) -> FloatArray: ...
def similarity(
    table: FloatArray,
    *,
    slots: int = 0,
    source_grid: Optional[Sides] = None,
    refs: int = 16,
    memory_limit: Size = "4G",
) -> Similarity: ...
def fidelity(
    before: FloatArray,
    after: FloatArray,
    *,
    slots: int = 0,
    source_grid: Optional[Sides] = None,
    after_slots: Optional[int] = None,
    after_grid: Optional[Sides] = None,
    refs: int = 16,
    memory_limit: Size = "4G",
) -> Fidelity: ...
def draw_maps(
    before: Union[FloatArray, PathArg],
    after: Union[FloatArray, PathArg, None] = None,
    *,
    path: PathArg,
    slots: Optional[int] = None,
    source_grid: Optional[Sides] = None,
    after_slots: Optional[int] = None,
    after_grid: Optional[Sides] = None,
    refs: int = 16,
    force: bool = False,
    name: str = "table",
    tensor: Optional[str] = None,
    patch: Optional[int] = None,
    channels: Optional[Channels] = None,
    memory_limit: Size = "4G",
) -> Dict[str, Any]: ...
