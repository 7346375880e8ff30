"""Load orders: the demo shop on first open, an upload, the column choices and the row account."""

from __future__ import annotations

from functools import partial
from pathlib import Path

import pandas as pd
import streamlit as st

from dashboard import layout, state, words
from forecasting import csv_text
from forecasting.exports import HEADINGS
from forecasting.io import rules
from forecasting.reading import NOTES, REASONS

HERE = "load"

layout.page_header(
    "Load orders",
    "Start here: bring in your shop's order export, check which column is which, "
    "and see exactly which rows were used and which were left out, and why.",
)

# ---------------------------------------------------------------------------
# The file


def _use_demo() -> None:
    demo = state.demo_dataset()
    if demo is not None:
        state.offer(demo)


def _drop_pending() -> None:
    st.session_state["pending"] = None


note = st.empty()  # filled below, once a new upload has been read

limit = st.get_option("server.maxUploadSize")
upload = st.file_uploader(
    f"Upload your order export: CSV, Excel (.xlsx) or Parquet, up to {limit} MB",
    type=["csv", "tsv", "txt", "xlsx", "parquet"],
    key="upload",
    help="One row per order or per order line, with a header row. Most shop platforms' order exports work "
         "as they are. The file is read on this computer only.",
)


def read_with_progress(dataset: state.Dataset, label: str) -> None:
    """Read a file (a named step while it takes time), then use it or keep it aside with its problem."""
    work = layout.Work(1)
    work.step(label, state.read_dataset, dataset)
    work.finish()
    state.offer(dataset)


if upload is not None and upload.file_id != st.session_state.get("upload_seen"):
    st.session_state["upload_seen"] = upload.file_id
    arrived = state.Dataset.from_bytes(upload.getvalue(), upload.name)
    read_with_progress(arrived, f"Reading {upload.name} ({arrived.megabytes:,.1f} MB) and accounting for every row")
# A changed column box or reading option (see the callbacks below) is read here, where progress can show.
changed = st.session_state.pop("to_read", None)
if changed is not None:
    read_with_progress(changed, f"Reading {changed.name} again with the new choice ({changed.megabytes:,.1f} MB)")

pending = st.session_state.get("pending")
dataset = state.current()
if dataset is not None and dataset.demo:
    note.info(
        "The demo shop's orders are already loaded, so you can look around straight away: "
        f"{state.DEMO_SHOP} is an invented online shop selling houseplants, pots and garden tools. "
        "Upload your own export below to see your customers instead. An upload is held for this browser tab "
        "only: refreshing the page starts over here, with the demo shop."
    )
elif dataset is None and not state.DEMO_FILE.exists():
    note.info("The demo shop's file is not here, so there is nothing loaded yet: upload your own export below.")
if pending is not None:
    problem = state.read_dataset(pending).worded(HERE)
    kept = f"The data loaded before ({'the demo shop' if dataset.demo else dataset.name}) is still in use." \
        if dataset is not None else "Nothing else is loaded yet."
    st.error(f"**{pending.name} cannot be used yet.** {problem}\n\n{kept} "
             "Change the column boxes or the reading options below, or upload a corrected file.")
    if dataset is not None:
        st.button(f"Forget {pending.name} and keep the data loaded before", key="drop_pending",
                  on_click=_drop_pending)
elif dataset is not None and not dataset.demo:
    st.success(f"Using **{dataset.name}**. {layout.SESSION_NOTE}")
if dataset is not None and not dataset.demo and state.DEMO_FILE.exists():
    st.button("Go back to the demo shop", key="use_demo", on_click=_use_demo)

# ---------------------------------------------------------------------------
# Which column is which (for the file being fixed, else the file in use)

edited = state.being_edited()


def _mapping_changed(role: str) -> None:
    target = state.being_edited()
    st.session_state["to_read"] = target.with_override(role, st.session_state[f"map_{role}"])


def _option_changed(option: str) -> None:
    target = state.being_edited()
    value = st.session_state[f"opt_{option}"]
    st.session_state["to_read"] = target.with_options(**{option: value.strip() if isinstance(value, str) else value})


if edited is not None:
    columns = state.file_columns(edited)
    guessed = state.guessed_mapping(edited)
    st.subheader("Which column is which")
    st.caption(
        f"For {edited.name}. The boxes show our guess from the headings and the values; change any of them "
        "and the orders are read again straight away. Customer, order date and order amount are needed; "
        "the rest help when your file has them."
    )
    if columns:
        boxes = st.columns(4)
        for i, (role, label) in enumerate(state.ROLE_LABELS.items()):
            key = f"map_{role}"
            value = guessed.get(role, "")
            options = [""] + [c for c in columns]
            if value not in options:
                options.append(value)
            st.session_state[key] = value
            empty = "(choose a column)" if role in state.REQUIRED else "(none)"
            boxes[i % 4].selectbox(
                label, options, key=key, format_func=lambda c, empty=empty: c if c else empty,
                on_change=_mapping_changed, args=(role,), help=state.ROLE_HELP[role],
            )
    pending_error = state.read_dataset(pending).error if pending is not None else None
    with st.expander(f"{words.READING_OPTIONS}: currency, dates, decimal mark, header row, which orders to keep",
                     expanded=bool(pending_error and pending_error.get("option"))):
        st.caption("Usually worked out from the file. Set them when a message above asks you to; the orders are "
                   "read again straight away.")
        label = words.CONTROL_LABELS
        first, second, third = st.columns(3)
        st.session_state["opt_currency"] = edited.currency
        first.text_input(label["currency"], key="opt_currency", placeholder="for example EUR",
                         on_change=_option_changed, args=("currency",),
                         help="When one file mixes currencies, choose one (a code like USD, EUR or GBP); "
                              "rows in other currencies are left out and listed below.")
        st.session_state["opt_date_order"] = edited.date_order
        second.selectbox(label["date_order"], ["", "day-first", "month-first"], key="opt_date_order",
                         format_func={"": "work it out from the dates", "day-first": "day first (31/12/2025)",
                                      "month-first": "month first (12/31/2025)"}.get,
                         on_change=_option_changed, args=("date_order",))
        st.session_state["opt_decimal"] = edited.decimal
        third.selectbox(label["decimal"], ["", ".", ","], key="opt_decimal",
                        format_func={"": "work it out from the amounts", ".": "point (1,234.50)",
                                     ",": "comma (1.234,50)"}.get,
                        on_change=_option_changed, args=("decimal",))
        st.session_state["opt_header_row"] = edited.header_row
        first.number_input(label["header_row"], key="opt_header_row", min_value=1, step=1, value=None,
                           placeholder="found by itself", on_change=_option_changed, args=("header_row",),
                           help=words.CONTROL_HELP["header_row"])
        sheets = state.workbook_sheets(edited)
        if len(sheets) > 1 or edited.sheet:
            choices = [""] + sheets[1:] + ([edited.sheet] if edited.sheet and edited.sheet not in sheets[1:] else [])
            st.session_state["opt_sheet"] = edited.sheet
            second.selectbox(label["sheet"], choices, key="opt_sheet", on_change=_option_changed, args=("sheet",),
                             format_func=lambda name: name if name else f"the first sheet ({sheets[0]})"
                             if sheets else "the first sheet", help=words.CONTROL_HELP["sheet"])
        st.session_state["opt_keep_unpaid"] = edited.keep_unpaid
        st.checkbox(label["keep_unpaid"], key="opt_keep_unpaid", on_change=_option_changed, args=("keep_unpaid",))
        st.caption(words.CONTROL_HELP["keep_unpaid"])
        st.session_state["opt_keep_implausible"] = edited.keep_implausible
        st.checkbox(label["keep_implausible"], key="opt_keep_implausible", on_change=_option_changed,
                    args=("keep_implausible",))
        st.caption(words.CONTROL_HELP["keep_implausible"])
        if dataset is not None and pending is None:
            found = state.currency_code(dataset)
            codes = [""] + list(words.SYMBOLS)
            third.selectbox(
                "Show amounts in", codes, **state.remember("shown_currency", "", codes),
                format_func=lambda code, found=found: (f"the file's currency ({found})" if found
                                                       else "no currency sign (choose one here)")
                if not code else f"{code} ({words.currency_symbol(code).strip()})",
                help="Only how amounts are shown on these pages and in the Excel downloads; the numbers stay "
                     "the same. The file's currency is the one kept above, else the one its currency column or "
                     "the marks beside its amounts name.")

# ---------------------------------------------------------------------------
# The row account of the data in use

result = state.current_result()
if result is not None:
    audit = result.audit()
    st.subheader("What was read")
    if pending is not None:
        st.caption(f"These numbers are for {'the demo shop' if dataset.demo else dataset.name}, still in use.")
    cells = st.columns(5)
    cells[0].metric("Rows read", f"{audit['rows_read']:,}")
    cells[1].metric("Rows used", f"{audit['rows_used']:,}")
    cells[2].metric("Rows left out", f"{audit['rows_excluded']:,}")
    cells[3].metric("Orders", f"{audit['orders']:,}", help="Lines with the same order number count as one order.")
    cells[4].metric("Customers", f"{audit['customers']:,}")
    implausible = {code: rows for code, rows in audit["excluded"].items() if code.startswith("implausible")}
    if implausible:
        said = "; ".join(f"{rows:,} {'row' if rows == 1 else 'rows'}: {REASONS[code]}"
                         for code, rows in implausible.items())
        st.warning(f"**Check these rows first**, listed first below ({said}). They look like typing mistakes, so "
                   f"they are left out; if they are real, tick '{words.CONTROL_LABELS['keep_implausible']}' under "
                   f"{words.READING_OPTIONS}.", icon=":material/priority_high:")
    status_note = rules.unrecognised_status_note(result.unrecognised_statuses)
    for note in audit["notes"]:
        if note not in status_note:  # the statuses have their own table below
            st.markdown(f"- {note}")
    if result.unrecognised_statuses:
        st.markdown(f"**Statuses the reader does not know** (column '{result.mapping.status}'): these rows were "
                    "used as paid orders. If one of them means unpaid, cancelled or refunded, change it in the "
                    "export and upload it again.")
        statuses = pd.DataFrame({"Status as written": list(result.unrecognised_statuses),
                                 "Rows": list(result.unrecognised_statuses.values()),
                                 "What was done": "used as paid orders"})
        st.dataframe(statuses, hide_index=True, width="content", key="unknown_statuses",
                     height=layout.table_height(len(statuses)),
                     column_config={"Rows": st.column_config.NumberColumn(format="localized")})

    if audit["rows_excluded"]:
        reasons = pd.DataFrame(
            {"Why the rows were left out": [REASONS[code] for code in audit["excluded"]],
             "Rows": list(audit["excluded"].values())}
        )
        st.dataframe(reasons, hide_index=True, width="content", key="left_out_reasons",
                     height=layout.table_height(len(reasons)),
                     column_config={"Rows": st.column_config.NumberColumn(format="localized")})
        left_out = state.left_out_rows(dataset)
        st.markdown(f"**The {len(left_out):,} rows left out**, with the row number your spreadsheet shows "
                    "(the header is row 1) and the reason:")
        if state.pseudonym_salt() is not None:
            st.caption("Pseudonyms are on: the customer column shows codes, and only the columns read as orders "
                       "are shown (the row's other cells and its text as written are left out).")
        st.dataframe(left_out.drop(columns=["reason_code"]).head(1000), hide_index=True,
                     height=layout.table_height(len(left_out), most=320),
                     key="left_out_rows",
                     column_config={"row": st.column_config.NumberColumn(HEADINGS["row"], format="%d"),
                                    "reason": st.column_config.TextColumn(HEADINGS["reason"], width="large"),
                                    "raw_text": st.column_config.TextColumn(
                                        HEADINGS["raw_text"], help="For rows that could not be split into the "
                                        "file's columns: the row's text as it is in the file.")})
        if len(left_out) > 1000:
            st.caption("The first 1,000 are shown; the download has them all.")
        st.download_button(
            "Download the rows left out, with reasons (CSV)", data=partial(csv_text, left_out),
            file_name=f"{Path(dataset.name).stem}_rows_left_out.csv", mime="text/csv",
            key="download_left_out", on_click="ignore",
        )
    else:
        st.success("Every row was used.")
    if audit["noted"]:
        noted = result.noted
        st.markdown(f"**Rows used with a note** ({noted['row'].nunique():,} rows): used as orders, with something "
                    "you may want to know.")
        kinds = pd.DataFrame({"What was noted": [NOTES[code] for code in audit["noted"]],
                              "Rows": list(audit["noted"].values())})
        st.dataframe(kinds, hide_index=True, width="content", key="noted_kinds",
                     height=layout.table_height(len(kinds)),
                     column_config={"Rows": st.column_config.NumberColumn(format="localized")})
        with st.expander(f"See the {len(noted):,} notes row by row"):
            st.dataframe(noted.drop(columns=["note_code"]).head(1000), hide_index=True, key="noted_rows",
                         height=layout.table_height(min(len(noted), 1000), most=320),
                         column_config={"row": st.column_config.NumberColumn(HEADINGS["row"], format="%d"),
                                        "note": st.column_config.TextColumn("Note", width="large")})
            if len(noted) > 1000:
                st.caption("The first 1,000 are shown; the download has them all.")
            st.download_button("Download the notes (CSV)", data=partial(csv_text, noted),
                               file_name=f"{Path(dataset.name).stem}_rows_noted.csv", mime="text/csv",
                               key="download_noted", on_click="ignore", icon=":material/download:")
    with st.expander("See the cleaned orders"):
        shown = state.shown_ids(result.orders.head(1000), dataset).rename(columns=HEADINGS)
        symbol = state.money_symbol(dataset)
        st.dataframe(shown, hide_index=True, key="clean_orders",
                     column_config={HEADINGS["order_value"]: st.column_config.NumberColumn(
                                        format=layout.money_format(symbol)),
                                    HEADINGS["order_date"]: st.column_config.DatetimeColumn(
                                        format="YYYY-MM-DD HH:mm")})
        if len(result.orders) > 1000:
            st.caption(f"The first 1,000 of {len(result.orders):,} orders.")
    layout.sharing_controls(HERE)
