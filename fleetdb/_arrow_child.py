"""The child side of :mod:`fleetdb.arrowread`:
``python -m fleetdb._arrow_child DB OUT SQL [--narrow] [--timestamp COLUMN ...]``.

Imports only the Arrow SQLite driver, runs the query and writes its rows to the Arrow IPC
file ``OUT``.
"""

from __future__ import annotations

import contextlib
import sys
from typing import Any

#: Rows per Arrow batch (the driver gives 1,024 by default: many small batches to write).
BATCH_ROWS = 65_536
_INTS = ("int8", "int16", "int32")


def _narrowed(table: Any, timestamps: tuple[str, ...]) -> Any:
    """The table with each integer column in the smallest integer type that holds all of
    its values, and the ``timestamps`` columns parsed from ISO 8601 text (left as text
    where any value does not parse). Fewer bytes to write, map, filter and convert."""
    import numpy as np
    import pyarrow as pa
    import pyarrow.compute as pc

    for i, field in enumerate(table.schema):
        column = table.column(i)
        if field.name in timestamps and pa.types.is_string(field.type):
            with contextlib.suppress(pa.ArrowInvalid, pa.ArrowNotImplementedError):
                # (not plain ISO 8601: left as text, for the parent to parse)
                table = table.set_column(i, field.name, column.cast(pa.timestamp("us")))
        elif pa.types.is_int64(field.type) and len(column) and column.null_count == 0:
            low, high = pc.min_max(column).values()
            for name in _INTS:
                info = np.iinfo(name)
                if info.min <= low.as_py() and high.as_py() <= info.max:
                    table = table.set_column(i, field.name, column.cast(getattr(pa, name)()))
                    break
    return table


def read_to_ipc(path: str, sql: str, out_path: str, *, narrow: bool = False,
                timestamps: tuple[str, ...] = ()) -> int:
    """Run ``sql`` on ``path`` with ADBC and write the result into an Arrow IPC file.

    The driver's low-level API: its DB-API layer imports pandas and pyarrow's datasets,
    which would triple this process's start-up. ``narrow``/``timestamps``: see
    :func:`_narrowed` (the whole result is held to choose the types).
    """
    import adbc_driver_manager
    import adbc_driver_sqlite
    import pyarrow as pa

    rows = 0
    with adbc_driver_sqlite.connect(path) as database, \
            adbc_driver_manager.AdbcConnection(database) as conn, \
            adbc_driver_manager.AdbcStatement(conn) as statement:
        statement.set_options(**{"adbc.sqlite.query.batch_rows": str(BATCH_ROWS)})
        statement.set_sql_query(sql)
        stream, _ = statement.execute_query()
        reader = pa.RecordBatchReader._import_from_c(stream.address)
        if narrow or timestamps:
            table = _narrowed(reader.read_all(), timestamps)
            batches, schema = table.to_batches(max_chunksize=BATCH_ROWS), table.schema
        else:
            batches, schema = reader, reader.schema
        with pa.OSFile(out_path, "wb") as sink, pa.ipc.new_file(sink, schema) as writer:
            for batch in batches:
                writer.write_batch(batch)
                rows += batch.num_rows
    return rows


if __name__ == "__main__":  # DB OUT SQL [--narrow] [--timestamp COLUMN ...]
    options = sys.argv[4:]
    read_to_ipc(sys.argv[1], sys.argv[3], sys.argv[2], narrow="--narrow" in options,
                timestamps=tuple(options[i + 1] for i, o in enumerate(options)
                                 if o == "--timestamp"))
