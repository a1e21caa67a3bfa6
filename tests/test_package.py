import panel


def test_version_matches_distribution():
    from importlib.metadata import version

    assert panel.__version__ == version("riskprem")
