"""One error root and one exit-code table: every exception class the package defines
derives from ``ShoalError`` and carries an ``exit_code`` that the table in
``shoal.daemon.errors`` lists, on the line naming the class where it sets its own."""

from __future__ import annotations

import importlib
import inspect
import pkgutil
import re

import pytest

import shoal.config
import shoal.core
import shoal.daemon
from shoal.core.errors import ShoalError
from shoal.daemon import errors
from shoal.daemon.cli import main as cli


def package_exceptions():
    found = []
    for pkg in (shoal.core, shoal.config, shoal.daemon):
        for info in pkgutil.walk_packages(pkg.__path__, pkg.__name__ + "."):
            module = importlib.import_module(info.name)
            found += [c for c in vars(module).values()
                      if inspect.isclass(c) and issubclass(c, BaseException)
                      and c.__module__ == module.__name__]
    return found


def exit_code_table():
    """{code: text of its line} from the table in shoal.daemon.errors' docstring."""
    table = {}
    for m in re.finditer(r"^- (\d+): (.*?)(?=^- |\Z)", errors.__doc__, re.M | re.S):
        table[int(m.group(1))] = " ".join(m.group(2).split())
    return table


def test_the_table_is_read():
    table = exit_code_table()
    assert {0, 1, 2, 3, 4, 130} <= set(table)
    assert "StateError" in table[3]


def test_every_error_derives_from_the_root():
    classes = package_exceptions()
    assert len(classes) >= 15   # the walk reaches every part (core, config, daemon)
    strays = [f"{c.__module__}.{c.__name__}" for c in classes if not issubclass(c, ShoalError)]
    assert not strays, strays


def test_every_exit_code_is_in_the_table():
    table = exit_code_table()
    for c in package_exceptions():
        assert isinstance(c.exit_code, int), c
        assert c.exit_code in table, f"{c.__name__}.exit_code = {c.exit_code} is not in the table"
        if "exit_code" in vars(c):   # a class that sets its own code is named on its line
            assert re.search(rf"\b{c.__name__}\b", table[c.exit_code]), (c, table[c.exit_code])


def test_config_error_is_still_a_value_error():
    assert issubclass(shoal.config.ConfigError, ValueError)
    assert shoal.config.ConfigError.exit_code == 2


@pytest.mark.parametrize("error, code", [
    (shoal.config.ConfigError("bad key"), 2),
    (errors.StateError("locked"), 3),
    (shoal.core.ModelError("bad shape"), 1),
])
def test_main_returns_the_error_s_exit_code(monkeypatch, capsys, error, code):
    def fail(_args):
        raise error

    parser = cli.build_parser()
    monkeypatch.setattr(cli, "build_parser", lambda: parser)
    args = parser.parse_args(["config", "-c", "unused.yaml"])
    monkeypatch.setattr(parser, "parse_args", lambda argv=None: args)
    args.func = fail
    assert cli.main([]) == code
    assert str(error) in capsys.readouterr().err
