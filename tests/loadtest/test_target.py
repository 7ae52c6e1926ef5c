"""The service URL check: load goes only to the base URL given."""

from __future__ import annotations

import pytest

from service.errors import LoadTestError
from loadtest.target import check_service_url


def test_base_urls_pass_without_trailing_slash() -> None:
    assert check_service_url("http://127.0.0.1:8000/") == "http://127.0.0.1:8000"
    assert check_service_url("https://127.0.0.1:8443") == "https://127.0.0.1:8443"


@pytest.mark.parametrize("url", ["127.0.0.1:8000", "ftp://h:1", "http://h:1/v1", "http://h:1?x=1", "http://h:99999", "http://"])
def test_other_urls_are_refused_by_name(url: str) -> None:
    with pytest.raises(LoadTestError, match=repr(url).replace("?", r"\?")):
        check_service_url(url)
