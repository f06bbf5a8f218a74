"""The public surface: what ``import creditsurv`` offers."""

import creditsurv


def test_all_names_exist_and_are_exactly_the_public_surface():
    # Every name in __all__ resolves, and no public name is exported by accident.
    for name in creditsurv.__all__:
        assert hasattr(creditsurv, name), name
    public = {n for n in vars(creditsurv) if not n.startswith("_")}
    modules = {n for n in public if type(getattr(creditsurv, n)).__name__ == "module"}
    assert public - modules == set(creditsurv.__all__) - {"__version__"}


def test_errors_share_one_root():
    from creditsurv import errors

    classes = [v for v in vars(errors).values() if isinstance(v, type) and issubclass(v, Exception)]
    for cls in classes:
        if issubclass(cls, Warning):
            assert issubclass(cls, errors.CreditsurvWarning)
        else:
            assert issubclass(cls, errors.CreditsurvError)


def test_the_commands_take_a_path_or_a_config(tmp_path):
    # check() on the shipped demo config, given as a path and as a loaded Config:
    # the same check table, and the demo book passes every error-level check.
    from pathlib import Path

    config = Path(__file__).resolve().parents[1] / "configs" / "demo.yaml"
    by_path = creditsurv.check(config, out=tmp_path / "a.csv")
    by_config = creditsurv.check(creditsurv.load_config(config), out=tmp_path / "b.csv")
    assert isinstance(by_path, creditsurv.Outcome) and not by_path.failed
    assert by_path.text == by_config.text
    assert (tmp_path / "a.csv").read_bytes() == (tmp_path / "b.csv").read_bytes()
    assert "duplicate_loan_months" in by_path.text
