"""Build the invented demo fleet (demo_fleet/) into a store through the normal import path."""

from __future__ import annotations

import datetime as dt
import hashlib

import pandas as pd
from sqlalchemy import text
from sqlalchemy.engine import Engine

from fleetdb.csvfiles import COLUMNS, CsvFile
from fleetdb.ingest import import_csv

DEMO_PREFIX = "demo-fleet"


def _as_csv(name: str, kind: str, frame: pd.DataFrame) -> CsvFile:
    required, optional = COLUMNS[kind]
    cols = [c for c in (*required, *optional) if c in frame.columns]
    body = frame[cols].astype(object).where(frame[cols].notna(), "").astype(str)
    for col in cols:
        body[col] = body[col].str.strip()
    body.index = pd.RangeIndex(2, 2 + len(body))
    digest = hashlib.sha256(body.to_csv(index=False).encode()).hexdigest()
    return CsvFile(name=name, kind=kind, frame=body, sha256=digest)


def build_into(engine: Engine, as_of: dt.date | None = None, seed: int = 42) -> list[str]:
    """Generate the demo fleet and import it; a no-op when it is already there.

    :param engine: the store (at the newest schema).
    :param as_of: the last day of the demo history (default: today).
    :param seed: random seed of the generator.
    :returns: lines describing what happened.
    """
    import demo_fleet

    with engine.connect() as conn:
        built = conn.execute(text("SELECT file_name, created_at FROM import_batch "
                                  "WHERE file_name LIKE :p ORDER BY id"),
                             {"p": f"{DEMO_PREFIX}%"}).first()
    if built is not None:
        return [f"The demo fleet is already in this database ({built[0]}, built "
                f"{str(built[1])[:16]}); nothing to do."]
    fleet = demo_fleet.build(as_of=as_of, seed=seed)
    day = (as_of or dt.date.today()).isoformat()
    lines = []
    for kind, frame in (("fleet", fleet.fleet), ("events", fleet.events), ("tests", fleet.tests)):
        report = import_csv(engine, _as_csv(f"{DEMO_PREFIX}-{day}-seed{seed}-{kind}.csv", kind,
                                            frame), by="demo", source="demo")
        lines.append(report.summary())
    return lines
