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
