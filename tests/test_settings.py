"""Program settings: who is recorded on what calib stores."""

from __future__ import annotations

import os
import pwd

import pytest

from calib.settings import Settings


def test_user_falls_back_to_the_login_name_not_unknown(monkeypatch: pytest.MonkeyPatch) -> None:
    for name in ("CALIB_USER", "LOGNAME", "USER", "LNAME", "USERNAME"):
        monkeypatch.delenv(name, raising=False)
    assert Settings().user == pwd.getpwuid(os.getuid()).pw_name
    monkeypatch.setenv("CALIB_USER", "A. Quant")
    assert Settings().user == "A. Quant"
