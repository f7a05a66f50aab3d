"""The child side of :mod:`fleetdb.arrowread`: ``python -m fleetdb._arrow_child DB OUT SQL...``.

Imports only the Arrow SQLite driver, runs each query and writes one Arrow IPC file per
query (``OUT.0``, ``OUT.1``, ... for an ``OUT`` ending in ``.arrow``; one query to the
file ``OUT`` itself otherwise).
"""

from __future__ import annotations

import sys


def read_to_ipc(path: str, sql: str, out_path: str) -> int:
    """Run ``sql`` on ``path`` with ADBC and write the result to an Arrow IPC file."""
    return read_many_to_ipc(path, [sql], [out_path])


def read_many_to_ipc(path: str, queries: list[str], out_paths: list[str]) -> int:
    """Run each query on one ADBC connection (one read transaction); write each result."""
    import adbc_driver_sqlite.dbapi as adbc
    import pyarrow as pa

    rows = 0
    with adbc.connect(path) as conn, conn.cursor() as cursor:
        for sql, out_path in zip(queries, out_paths, strict=True):
            cursor.execute(sql)
            table = cursor.fetch_arrow_table()
            with pa.OSFile(out_path, "wb") as sink, pa.ipc.new_file(sink, table.schema) as w:
                w.write_table(table)
            rows += table.num_rows
            del table
    return rows


if __name__ == "__main__":
    if sys.argv[2].endswith(".arrow"):  # DB OUT SQL...: OUT.0, OUT.1, ...
        sqls = sys.argv[3:]
        read_many_to_ipc(sys.argv[1], sqls, [f"{sys.argv[2]}.{i}" for i in range(len(sqls))])
    else:  # DB OUT.i SQL: one query to the file named
        read_to_ipc(sys.argv[1], sys.argv[3], sys.argv[2])
