"""The upload limit is declared once (app.datastore.MAX_REQUEST_BYTES) and reaches the server
config, the upload control's max_size and the text beside it.

Reference for the arithmetic: base64 turns every 3 bytes into 4 (RFC 4648, section 4).
"""
from __future__ import annotations

from app import ids
from app.datastore import MAX_REQUEST_BYTES, upload_limit
from app.server import create_app


def _find(component, cid):
    if getattr(component, "id", None) == cid:
        return component
    children = getattr(component, "children", None)
    for child in children if isinstance(children, (list, tuple)) else [children]:
        if child is not None and hasattr(child, "to_plotly_json"):
            hit = _find(child, cid)
            if hit is not None:
                return hit
    return None


def test_one_limit_reaches_server_control_and_text():
    app = create_app()
    assert app.server.config["MAX_CONTENT_LENGTH"] == MAX_REQUEST_BYTES == 200 * 1024 * 1024
    layout = app.layout()
    upload = _find(layout, ids.DATA_UPLOAD)
    limit = upload_limit()
    assert upload.max_size == limit
    # a file of that size, base64-encoded, fits in one request
    assert 4 * -(-limit // 3) < MAX_REQUEST_BYTES
    assert "150 MB" in _find(layout, ids.DATA_UPLOAD_LIMIT).children
    assert "cohortlens serve FILE" in _find(layout, ids.DATA_UPLOAD_LIMIT).children


def test_a_smaller_request_limit_shrinks_the_upload_limit():
    app = create_app(max_request_bytes=1024 * 1024)
    upload = _find(app.layout(), ids.DATA_UPLOAD)
    assert upload.max_size == upload_limit(1024 * 1024) < 1024 * 1024 * 3 // 4
