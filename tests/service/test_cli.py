"""The `cairn` entry point: an unknown option is blamed on the subcommand that got it, with that
subcommand's usage (exit 2, argparse's convention for usage errors)."""

from __future__ import annotations

import pytest

from service.cli import main


@pytest.mark.parametrize(
    "argv, usage",
    [
        (["artifacts", "list", "--bogus"], "usage: cairn artifacts list"),
        (["artifacts", "--bogus"], "usage: cairn artifacts"),
        (["switch", "shop/v1", "--bogus"], "usage: cairn switch"),
        (["serve", "--bogus"], "usage: cairn serve"),
    ],
)
def test_an_unknown_option_prints_the_subcommands_usage(argv, usage, capsys) -> None:
    with pytest.raises(SystemExit) as exit_:
        main(argv)
    err = capsys.readouterr().err
    assert exit_.value.code == 2
    assert err.startswith(usage) and "unrecognized arguments: --bogus" in err
    assert "usage: cairn [-h] COMMAND" not in err
