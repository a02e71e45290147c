"""Whole-catalogue runs: the core applied partition by partition with Dask.

A catalogue too large for one HTTP request (or one machine's memory) is processed as a
dask.dataframe over Parquet (or CSV) files: each partition is read with only the columns a
job needs, handed to the core's vectorised functions as numpy arrays, and written back as
Parquet with the results and per-row flags. The same functions as the HTTP service, so the
numbers are the same to the last bit; Dask only decides which partition runs where (the
local scheduler by default, a dask.distributed cluster when its address is given).

Jobs (:data:`JOBS`; ``skydrift batch fields JOB`` lists inputs and outputs)
----------------------------------------------------------------------------
``propagate``
    :func:`service.core.propagation.propagate` to one target epoch.
``constellations``
    :func:`service.core.constellations.locate` (positions as given) or
    :func:`~service.core.constellations.locate_moving` (each star moved to ``--epoch``
    first): the IAU constellation, the distance to the nearest boundary and the
    constellation across it.
``velocity``
    :func:`service.core.kinematics.space_velocity`: transverse, radial and total velocity,
    U V W (heliocentric and LSR) with linear uncertainties, secular quantities.

Column mapping
--------------
Inputs are found by canonical field name (``ra_deg``, ``pm_dec_mas_yr``, ...). A catalogue
with other column names maps them, canonical name on the left::

    --columns ra_deg=RA_ICRS,dec_deg=DE_ICRS,parallax_mas=Plx

or with a JSON or TOML file of the same pairs (``--columns-file``; a TOML file may also put
them under a ``[columns]`` table). Values must already be in the canonical units. Optional
fields absent from the input are unknown for every row (the core's flags then say so); a
required field absent, or any explicitly mapped column absent, stops the run before any work
with a message naming the column.

Unknown values (NaN in the core's results) are written as Parquet nulls, which pandas and
Dask read back as NaN.

CSV input
---------
Read by the rule of every other CSV the service reads (:mod:`.csvinput`): unique column
names, as many cells per row as the header, only an empty cell unknown ("nan", "NA", "null"
are refused), numbers in ASCII digits. A refused row or cell stops the run with one line
naming the file, the line and the column (:class:`BatchDataError` part-way,
:class:`BatchInputError` in the first rows, read before any work); no output is left.

Per-row flags
-------------
Every output row carries ``row_flags`` (:class:`RowFlag`: the row could not be computed at
all, e.g. NaN in a required field or a declination beyond 90 degrees; its results are then
NaN and its job flags 0) and the job's own flag column (``propagation_flags``:
:class:`~service.core.propagation.PropagationFlag`; ``velocity_flags``:
:class:`~service.core.kinematics.KinematicsFlag`). Flag columns are unsigned 32-bit bit
masks; the metadata file lists every bit with its name and meaning, and :func:`flag_names`
turns a column into lists of names.

Metadata
--------
Beside the Parquet parts, ``_skydrift_run.json`` records the job, the input and its column
mapping, the parameters (epochs as given, as Julian epoch TDB and ISO UTC; model; frames),
the data tables used, the flag meanings and counts, how the run was executed, and the
versions of the service and of numpy, pyerfa (with its ERFA), astropy, astropy-iers-data,
pandas, pyarrow and dask (on the workers too, on a cluster). Parquet readers skip files
whose names begin with an underscore.

Dask and pandas come with the optional extra ``skydrift[batch]`` (pyarrow, which it lists
too, is also a dependency of the service); they are imported only when a run starts, so the
HTTP service does not need them.
"""

from .engine import (
    METADATA_FILE,
    BatchPlan,
    RunSummary,
    build_output,
    flag_names,
    make_plan,
    output_meta,
    parse_column_mapping,
    process_partition,
    read_metadata,
    run_batch,
)
from .jobs import CONSTELLATIONS, JOBS, PROPAGATE, VELOCITY
from .spec import (
    FLAG_DTYPE,
    BatchDataError,
    BatchInputError,
    BatchJob,
    InputField,
    OutputColumn,
    RowFlag,
)

__all__ = [
    "CONSTELLATIONS",
    "FLAG_DTYPE",
    "JOBS",
    "METADATA_FILE",
    "PROPAGATE",
    "VELOCITY",
    "BatchDataError",
    "BatchInputError",
    "BatchJob",
    "BatchPlan",
    "InputField",
    "OutputColumn",
    "RowFlag",
    "RunSummary",
    "build_output",
    "flag_names",
    "make_plan",
    "output_meta",
    "parse_column_mapping",
    "process_partition",
    "read_metadata",
    "run_batch",
]
