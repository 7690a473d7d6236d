"""Write the bad-input corpus: one small file per case, each read by tests/test_bad_inputs_data.py.

Run from anywhere: ``python tests/data/bad/make_corpus.py``. Text files only; the Parquet
cases, the folder and the unreadable file are made by the test at run time. Columns of every
table: ``id`` (subject), ``t`` (time), ``y`` (response); three subjects with three visits each.
"""
from __future__ import annotations

import os
from pathlib import Path

HERE = Path(__file__).resolve().parent


def table(times, ys=None, *, sep: str = ",", header: str = "id,t,y") -> str:
    """Three subjects (a, b, c) x three visits with the given time and response cells."""
    ys = ys or ["1.0", "2.0", "3.0"] * 3
    rows = [header.replace(",", sep)]
    for i, (t, y) in enumerate(zip(times, ys)):
        rows.append(sep.join(("abc"[i // 3], t, y)))
    return "\n".join(rows) + "\n"


NUMBERS = ["0", "1", "2"] * 3

TEXT_FILES: dict[str, str] = {
    # 3. non-finite values in time or response
    "time_infinite.csv": table(["0", "1", "inf"] + NUMBERS[3:]),
    "time_minus_infinite.csv": table(["-inf", "1", "2"] + NUMBERS[3:]),
    "time_too_large.csv": table(["0", "1", "1e309"] + NUMBERS[3:]),
    "response_nan_text.csv": table(NUMBERS, ["1.0", "nan", "3.0"] + ["1.0", "2.0", "3.0"] * 2),
    "response_infinite.csv": table(NUMBERS, ["1.0", "2.0", "Infinity"] + ["1.0", "2.0", "3.0"] * 2),
    # 1. dates: one format per column
    "dates_order_unclear.csv": table(["01/02/2021", "03/04/2021", "05/06/2021"] * 3),
    "dates_mixed_order.csv": table(["25/01/2021", "13/02/2021", "28/03/2021",
                                    "01/25/2021", "02/13/2021", "03/28/2021",
                                    "20/01/2021", "21/02/2021", "22/03/2021"]),
    "dates_mixed_formats.csv": table(["2021-01-25", "2021-02-13", "2021-03-28",
                                      "2021-01-20", "2021-02-21", "2021-03-22",
                                      "20.01.2021", "21.02.2021", "22.03.2021"]),
    # 6. echoed values are cut short
    "long_cell.csv": table(NUMBERS, ["1.0", "x" * 5000, "3.0"] + ["1.0", "2.0", "3.0"] * 2),
    "long_column_name.csv": table(NUMBERS, header="id,t," + "w" * 5000),
    # 5. a file that is only a UTF-8 byte-order mark
    "bom_only.csv": "\ufeff",
}

#: a link whose target does not exist (a path that exists as a name but cannot be opened)
LINKS = {"broken_link.csv": "no_such_target.csv"}


def main() -> None:
    for name, text in TEXT_FILES.items():
        (HERE / name).write_bytes(text.encode("utf-8"))
    for name, target in LINKS.items():
        link = HERE / name
        if link.is_symlink() or link.exists():
            link.unlink()
        os.symlink(target, link)


if __name__ == "__main__":
    main()
