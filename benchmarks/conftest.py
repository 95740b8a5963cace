"""Collect the pytest-benchmark files (``bench_*.py``) when pytest is given this folder:
``.venv/bin/python -m pytest benchmarks --benchmark-only`` (the project's ``python_files``
default, ``test_*.py``, would collect none of them)."""

import pytest


def pytest_collect_file(file_path, parent):
    if (file_path.suffix == ".py" and file_path.name.startswith("bench_")
            and not parent.session.isinitpath(file_path)):
        return pytest.Module.from_parent(parent, path=file_path)
    return None
