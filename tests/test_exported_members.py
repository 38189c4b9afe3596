"""The public surface is exactly the names a notebook user needs."""

import scalewright


def test_exported_names_are_exactly_the_intended_ones():
    assert set(scalewright.__all__) == {
        "CheckResult", "ConvergenceWarning", "IdentificationWarning", "ImproperSolutionWarning",
        "ScalewrightWarning", "Study", "StudyError", "__version__", "check", "load_study"}
    for name in scalewright.__all__:
        assert hasattr(scalewright, name)


def test_version_matches_the_package_metadata():
    from importlib.metadata import version
    assert scalewright.__version__ == version("scalewright")
