"""The child side of :mod:`fleetdb.arrowread`: imports only the Arrow SQLite driver."""

from __future__ import annotations


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
