"""The child side of :mod:`fleetdb.arrowread`: ``python -m fleetdb._arrow_child DB OUT SQL``.

Imports only the Arrow SQLite driver, runs the query and writes its rows to the Arrow IPC
file ``OUT``.
"""

from __future__ import annotations

import sys

#: Rows per Arrow batch (the driver gives 1,024 by default: many small batches to write).
BATCH_ROWS = 65_536


def read_to_ipc(path: str, sql: str, out_path: str) -> int:
    """Run ``sql`` on ``path`` with ADBC and stream the result into an Arrow IPC file.

    The driver's low-level API: its DB-API layer imports pandas and pyarrow's datasets,
    which would triple this process's start-up.
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
        with pa.OSFile(out_path, "wb") as sink, \
                pa.ipc.new_file(sink, reader.schema) as writer:
            for batch in reader:
                writer.write_batch(batch)
                rows += batch.num_rows
    return rows


if __name__ == "__main__":  # DB OUT SQL
    read_to_ipc(sys.argv[1], sys.argv[3], sys.argv[2])
