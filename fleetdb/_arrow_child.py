"""The child side of :mod:`fleetdb.arrowread`: ``python -m fleetdb._arrow_child DB OUT SQL``.

Imports only the Arrow SQLite driver, runs the query and writes its rows to the Arrow IPC
file ``OUT``.
"""

from __future__ import annotations

import sys


def read_to_ipc(path: str, sql: str, out_path: str) -> int:
    """Run ``sql`` on ``path`` with ADBC and write the result to an Arrow IPC file."""
    import adbc_driver_sqlite.dbapi as adbc
    import pyarrow as pa

    with adbc.connect(path) as conn, conn.cursor() as cursor:
        cursor.execute(sql)
        table = cursor.fetch_arrow_table()
    with pa.OSFile(out_path, "wb") as sink, pa.ipc.new_file(sink, table.schema) as writer:
        writer.write_table(table)
    return table.num_rows


if __name__ == "__main__":  # DB OUT SQL
    read_to_ipc(sys.argv[1], sys.argv[3], sys.argv[2])
