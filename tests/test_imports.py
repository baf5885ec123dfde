"""The public front stays light: optional integrations are imported only on demand."""

import subprocess
import sys


def test_import_shiftwatch_leaves_optional_integrations_out():
    code = (
        "import sys, shiftwatch\n"
        "heavy = [m for m in ('lightning', 'pytorch_lightning', 'tensorboard', 'matplotlib',"
        " 'scipy', 'torch.utils.tensorboard') if m in sys.modules]\n"
        "print(heavy)\n"
        "assert not heavy, heavy\n"
        "assert sorted(shiftwatch.__all__) == list(shiftwatch.__all__)\n"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
    assert out.returncode == 0, out.stdout + out.stderr


def test_console_script_reports_version():
    import shiftwatch
    from shiftwatch.cli import main

    try:
        main(["--version"])
    except SystemExit as exc:
        assert exc.code == 0
    out = subprocess.run(
        [sys.executable, "-m", "shiftwatch.cli", "--version"], capture_output=True, text=True
    )
    assert out.returncode == 0 and shiftwatch.__version__ in out.stdout
