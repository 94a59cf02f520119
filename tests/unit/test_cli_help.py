"""Every option of every command has help text (a user's only guide besides the README)."""

from invert.cli import build_parser


def test_every_option_has_help():
    p = build_parser()
    sub = next(a for a in p._actions if a.__class__.__name__ == "_SubParsersAction")
    missing = {name: [a.option_strings[0] if a.option_strings else a.dest
                      for a in sp._actions if not a.help and a.dest != "help"]
               for name, sp in sub.choices.items()}
    assert all(not v for v in missing.values()), missing
