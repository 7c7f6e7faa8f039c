import pytest


@pytest.fixture(autouse=True)
def _in_empty_cwd(tmp_path, monkeypatch):
    """Every test runs in its own empty working directory, so no settings file of the repo is picked up."""
    monkeypatch.chdir(tmp_path)
