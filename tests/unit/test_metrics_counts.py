"""``GET /metrics`` counts only what the scraping key may read: a total would count hidden pages."""

from __future__ import annotations

import re

from tests.conftest import ServeIndex

PAGES = {
    "open/valves.md": "# Valves\n\nThe sluice valve is turned by hand.\n",
    "open/pumps.md": "# Pumps\n\nThe pump runs at night.\n",
    "hr/pay.md": "---\ngroups: [hr]\n---\n# Pay bands\n\nBand four starts here.\n",
    "hr/leave.md": "---\ngroups: [hr]\n---\n# Leave\n\nTwenty five days.\n",
    "hr/review.md": "---\ngroups: [hr]\n---\n# Reviews\n\nOnce a year.\n",
}


def gauge(text: str, name: str) -> float:
    match = re.search(rf"^{name} (\S+)$", text, re.M)
    assert match, f"{name} missing from /metrics"
    return float(match.group(1))


def test_index_gauges_count_only_what_the_key_may_read(serve_index: ServeIndex) -> None:
    served = serve_index(
        PAGES,
        keys=[("reader", "read", (), False), ("hr-reader", "read", ("hr",), False)],
    )
    outsider = served.client.get("/metrics", headers=served.auth("reader"))
    insider = served.client.get("/metrics", headers=served.auth("hr-reader"))
    assert outsider.status_code == insider.status_code == 200
    assert gauge(outsider.text, "sounding_index_documents") == 2
    assert gauge(insider.text, "sounding_index_documents") == 5
    # Each test page is one chunk; the outsider's count is the open pages' alone.
    assert gauge(outsider.text, "sounding_index_chunks") == 2
    assert gauge(insider.text, "sounding_index_chunks") == 5
    # The rest of the exposition is the same for both keys.
    assert gauge(outsider.text, "sounding_index_loaded") == 1
