"""Load data: upload CSV or XLSX files, see every problem before anything is written, then commit in one step."""

from __future__ import annotations

import hashlib
import io
import re
import tempfile
from pathlib import Path
from typing import Any

import pandas as pd
import streamlit as st

from tracker.errors import ImportErrors, KrtError
from tracker.io.specs import SPECS, table_for_name
from tracker.ui import data, widgets
from tracker.ui.main import context

#: One invented example row per table for the templates (units written out, as the format expects).
EXAMPLES: dict[str, dict[str, str]] = {
    "programs": {"program": "Example program", "target": "Example kinase", "intended_profile": "once-daily",
                 "engagement_threshold": "0.7", "onset_max": "3 h", "duration_min": "20 h", "offset_max": "",
                 "dosing_interval": "24 h", "target_half_life": "30 h"},
    "compounds": {"compound": "SAMPLE-0001", "program": "Example program", "series": "sample-amide", "stage": "hit", "smiles": ""},
    "potency": {"compound": "SAMPLE-0001", "assay": "binding 1h", "readout": "KD", "value": "3.2 nM", "incubation": "1 h",
                "format": "binding", "date": "2026-01-15", "source": "ELN page 12", "max_incubation": "24 h"},
    "kinetics": {"compound": "SAMPLE-0001", "method": "spr", "kon": "1e6 /M/s", "koff": "1e-4 /s", "date": "2026-02-01",
                 "source": "SPR run 7"},
    "pk": {"compound": "SAMPLE-0001", "species": "rat", "route": "oral", "half_life": "4 h", "free_cmax": "50 nM", "tmax": "1 h",
           "dosing_interval": "24 h", "source": "study 3"},
}

_SAFE = re.compile(r"[^A-Za-z0-9._ -]+")


def template_csv(table: str) -> bytes:
    """Header of ``table`` plus one invented example row, as CSV bytes."""
    cols = list(SPECS[table].names)
    row = EXAMPLES.get(table, {})
    return pd.DataFrame([[row.get(c, "") for c in cols]], columns=cols).to_csv(index=False).encode("utf-8")


def template_xlsx() -> bytes:
    """One workbook with a sheet per table (header + example row)."""
    from openpyxl import Workbook

    book = Workbook()
    book.remove(book.active)
    for table, spec in SPECS.items():
        ws = book.create_sheet(table)
        ws.append(list(spec.names))
        ws.append([EXAMPLES.get(table, {}).get(c, "") for c in spec.names])
    buf = io.BytesIO()
    book.save(buf)
    return buf.getvalue()


def stage_files(files: list[tuple[str, bytes]], folder: Path) -> list[Path]:
    """Write uploads into ``folder`` under their own (sanitised) names."""
    paths = []
    for name, content in files:
        safe = _SAFE.sub("_", Path(name).name) or "upload.csv"
        path = folder / safe
        path.write_bytes(content)
        paths.append(path)
    return paths


def error_rows(exc: ImportErrors, folder: Path) -> list[dict[str, Any]]:
    """Every error as ``{file, line, column, message, text}`` with the upload's own file name."""
    prefix = str(folder) + "/"
    rows = []
    for e in exc.errors:
        loc = e.location
        file = (loc.file.replace(prefix, "") if loc else "")
        line = loc.line if loc else None
        column = loc.column if loc else None
        text = f"{file}:{line}: {column}: {e.message}" if line is not None and column else \
            f"{file}:{line}: {e.message}" if line is not None else (f"{file}: {e.message}" if file else e.message)
        rows.append({"file": file, "line": line, "column": column or "", "message": e.message, "text": text})
    return rows


def run_import(engine, paths: list[Path], folder: Path, actor: str, *, table: str | None = None, commit: bool) -> dict[str, Any]:
    """Validate (``commit=False``: everything is checked inside a transaction that is rolled back) or import.

    Returns ``{"ok", "summary", "errors", "refused"}``; never raises for bad input.
    """
    from tracker.db.uow import UnitOfWork
    from tracker.services.importing import import_path

    target = paths[0] if len(paths) == 1 else folder
    try:
        if commit:
            summary = import_path(engine, target, table, actor=actor, progress=False)
        else:
            with UnitOfWork(engine) as uow:  # never committed: rolled back on exit
                summary = import_path(uow, target, table, actor=actor, progress=False)
    except ImportErrors as exc:
        return {"ok": False, "summary": None, "errors": error_rows(exc, folder), "refused": None}
    except KrtError as exc:
        return {"ok": False, "summary": None, "errors": [], "refused": widgets.one_line(exc).replace(str(folder) + "/", "")}
    return {"ok": True, "summary": summary, "errors": [], "refused": None}


def summary_frame(summary: dict[str, Any]) -> pd.DataFrame:
    rows = []
    for table, s in summary.get("tables", {}).items():
        rows.append({"Table": table, "Rows read": s.get("rows"), "New": s.get("inserted"), "Updated": s.get("updated"),
                     "Already stored": s.get("unchanged")})
    return pd.DataFrame(rows)


def render() -> None:
    ctx = context()
    st.title("Load data")
    st.caption("Upload one CSV per table (named programs.csv, compounds.csv, potency.csv, kinetics.csv, pk.csv, or "
               "starting with the table name) or one .xlsx workbook with a sheet per table. Everything is checked first; "
               "nothing is written until you commit, and a commit is all or nothing.")

    with st.expander("Templates", icon=":material/download:"):
        cols = st.columns(len(SPECS) + 1)
        for col, table in zip(cols, SPECS):
            col.download_button(f"{table}.csv", template_csv(table), file_name=f"{table}.csv", mime="text/csv", key=f"tpl_{table}")
        cols[-1].download_button("workbook.xlsx", template_xlsx(), file_name="tracker-template.xlsx",
                                 mime="application/vnd.openxmlformats-officedocument.spreadsheetml.sheet", key="tpl_xlsx")
        st.caption("Quantities carry their unit in the cell (3.2 nM, 30 min, 1e6 /M/s). Kinetics rows give koff or residence_time.")

    nonce = st.session_state.setdefault("load_nonce", 0)
    uploads = st.file_uploader("Files", type=["csv", "xlsx"], accept_multiple_files=True, key=f"load_files_{nonce}")
    if not uploads:
        done = st.session_state.get("load_done")
        if done:
            st.success(done)
        return
    files = [(u.name, u.getvalue()) for u in uploads]
    table = None
    if len(files) == 1 and files[0][0].lower().endswith(".csv") and table_for_name(Path(files[0][0]).stem) is None:
        table = st.selectbox("Which table does this file hold?", list(SPECS), key="load_table")
    ident = ctx.identity
    actor = ident.name if ident else "anonymous"
    digest = hashlib.sha256(b"".join(n.encode() + b"\0" + c for n, c in files) + str(table).encode()).hexdigest()
    with tempfile.TemporaryDirectory(prefix="krt-upload-") as tmp:
        folder = Path(tmp)
        paths = stage_files(files, folder)
        cache_key = (digest, ctx.version, actor)
        if st.session_state.get("load_check_key") != cache_key:
            st.session_state["load_check"] = run_import(ctx.engine, paths, folder, actor, table=table, commit=False)
            st.session_state["load_check_key"] = cache_key
        check = st.session_state["load_check"]
        if check["refused"]:
            st.error(widgets.md(check["refused"]))
            return
        if not check["ok"]:
            st.error(f"{len(check['errors'])} problem(s) found; nothing was written. Fix the file(s) and upload again.")
            st.code("\n".join(e["text"] for e in check["errors"]), language=None)
            st.dataframe(pd.DataFrame(check["errors"])[["file", "line", "column", "message"]], hide_index=True, placeholder="–", width="stretch")
            return
        st.success("The files are valid. This is what a commit would write:")
        st.dataframe(summary_frame(check["summary"]), hide_index=True, placeholder="–", width="stretch")
        for w in check["summary"].get("warnings", []):
            st.warning(widgets.md(w.replace(str(folder) + "/", "")))
        if not (ident and ident.can_write):
            st.info("Viewers cannot load data. Ask a lead or scientist.")
            return
        if st.button("Commit import", type="primary", key="load_commit"):
            result = run_import(ctx.engine, paths, folder, actor, table=table, commit=True)
            if result["ok"]:
                data.clear_caches()
                n = sum((s.get("inserted") or 0) + (s.get("updated") or 0) for s in result["summary"]["tables"].values())
                st.session_state["load_done"] = f"Imported: {n} row(s) written, {result['summary']['audit_events']} audit event(s) recorded."
                st.session_state["load_nonce"] = nonce + 1
                st.session_state.pop("load_check_key", None)
                st.rerun()
            elif result["refused"]:
                st.error(widgets.md(result["refused"]))
            else:
                st.error("The import was refused; nothing was written:")
                st.code("\n".join(e["text"] for e in result["errors"]), language=None)


if __name__ == "__main__":
    render()
