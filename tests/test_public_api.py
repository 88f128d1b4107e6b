"""The public surface of the package is explicit and pinned."""

from __future__ import annotations

import premises


def test_all_is_pinned() -> None:
    assert sorted(premises.__all__) == sorted(
        [
            "FORMAT_VERSION", "DataError", "DriftError", "Location", "ModelError", "PandocError",
            "PremisesError", "RenderError", "RenderOptions", "RuleError", "SpecError",
            "__version__", "check_file", "render_file", "render_text",
        ]
    )


def test_every_exported_name_resolves() -> None:
    for name in premises.__all__:
        assert getattr(premises, name) is not None


def test_error_tree_sits_on_builtin_bases() -> None:
    assert issubclass(premises.SpecError, ValueError)
    assert issubclass(premises.RuleError, premises.SpecError)
    assert issubclass(premises.DataError, ValueError)
    assert issubclass(premises.PandocError, OSError)
    for name in ("SpecError", "DataError", "ModelError", "DriftError", "RenderError", "PandocError", "RuleError"):
        assert issubclass(getattr(premises, name), premises.PremisesError)


def test_error_message_says_where_and_how() -> None:
    err = premises.SpecError("the 'se' key must be one of classical, hc3.", premises.Location("r.qmd", 12, "basil", "se"), hint="Write se: hc3.")
    assert str(err) == "r.qmd:12: block 'basil', key 'se': the 'se' key must be one of classical, hc3. Write se: hc3."
