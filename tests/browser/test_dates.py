"""Date order in the page: an upload whose dates read both day first and month first stops with
a message beside the time role; choosing the order beside it draws the views."""
from __future__ import annotations

import pandas as pd

from app import ids
from test_dashboard import (TIMEOUT, choose, map_roles, no_traceback, open_demo, shot, upload,
                            upload_frame, upload_reference, wait_drawn, wait_for_counts)


def test_unclear_date_order_is_asked_for_beside_the_time_role(server_url, page, artifacts,
                                                               tmp_path):
    url, _ = server_url
    open_demo(page, url)
    frame = upload_frame(120)
    visit = pd.to_datetime(frame["Visit dt"], format="%Y-%m-%d")
    frame = frame[(visit.dt.day <= 12).to_numpy()].reset_index(drop=True)  # every day <= 12
    written = frame.copy()
    for c in ("Visit dt", "Tx day"):
        written[c] = pd.to_datetime(frame[c], format="%Y-%m-%d").dt.strftime("%d/%m/%Y")
    path = tmp_path / "day first.csv"
    written.to_csv(path, index=False)
    upload(page, path)
    page.wait_for_function("() => document.getElementById('data-name').innerText"
                           ".includes('day first.csv')", timeout=TIMEOUT)
    map_roles(page)
    time_msg = page.locator(f"#{ids.ROLE_MSG['time']}")
    time_msg.get_by_text("date order", exact=False).wait_for(timeout=TIMEOUT)
    assert "dd/mm/yyyy" in time_msg.inner_text() and "mm/dd/yyyy" in time_msg.inner_text()
    shot(page, artifacts, "dates-order-asked", "#section-data")

    choose(page, ids.SETTING_INPUT["date_order"], "day first")
    # reference: the same visits with ISO dates, analysed by a fresh Workbench
    ref = upload_reference(frame)
    wait_for_counts(page, ref)
    assert time_msg.inner_text().strip() == ""
    wait_drawn(page, ids.COURSE_GRAPH)
    no_traceback(page)
    shot(page, artifacts, "dates-order-chosen", "#section-data")
