"""posgrid: find the position tables of vision-transformer checkpoints and resample them to a
new patch grid, from Python.

Files: ``scan`` and ``resize`` do what the command line's ``scan --json`` and ``resize --json``
do and return the same reports as dicts. Arrays: ``resample`` resamples a table held in a
numpy array (float32 or float64; ``[N, D]``, ``[1, N, D]`` or ``[1, H, W, D]``);
``similarity`` and ``fidelity`` compute the cosine-similarity maps and the fidelity score;
``draw_maps`` writes the figure as a PNG, from arrays or checkpoint files.

Only plain Python types and numpy arrays go in and out. A tensor of a training framework goes
through numpy: ``posgrid.resample(t.detach().cpu().numpy(), 24)``, and back with the
framework's ``from_numpy``.

Failures raise ``posgrid.Error`` subclasses carrying the command line's message and exit
code; bad argument types raise ``TypeError``, bad values ``posgrid.UsageError`` (a
``ValueError``).
"""

from ._errors import (
    Error,
    InvalidInputError,
    RefusedError,
    TableError,
    UsageError,
    WriteError,
)
from ._posgrid import (
    __version__,
    core_version,
    draw_maps,
    fidelity,
    resample,
    resize,
    scan,
    similarity,
)

__all__ = [
    "Error",
    "InvalidInputError",
    "RefusedError",
    "TableError",
    "UsageError",
    "WriteError",
    "__version__",
    "core_version",
    "draw_maps",
    "fidelity",
    "resample",
    "resize",
    "scan",
    "similarity",
]
