import pytest


def pytest_addoption(parser):
    parser.addoption("--runslow", action="store_true", default=False, help="run slow refinement studies")


def pytest_collection_modifyitems(config, items):
    if config.getoption("--runslow"):
        return
    skip = pytest.mark.skip(reason="slow study: run with --runslow")
    for item in items:
        if "slow" in item.keywords:
            item.add_marker(skip)
