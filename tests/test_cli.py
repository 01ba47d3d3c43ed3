"""CLI contract: exit codes, one-line errors, --version (common practice for Unix tools:
0 ok, 2 usage; argparse is the reference for usage errors)."""

import subprocess
import sys

from ecl_quant import __version__
from ecl_quant.cli import main


def test_version(capsys):
    assert main(["--version"]) == 0
    assert __version__ in capsys.readouterr().out


def test_no_command_is_usage_error(capsys):
    assert main([]) == 2
    assert "usage" in capsys.readouterr().err.lower()


def test_unknown_option_is_usage_error(capsys):
    assert main(["--no-such-option"]) == 2


def test_python_dash_m_runs():
    out = subprocess.run([sys.executable, "-m", "ecl_quant", "--version"],
                         capture_output=True, text=True, check=False)
    assert out.returncode == 0
    assert out.stdout.strip() == f"ecl-quant {__version__}"
