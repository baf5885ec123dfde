"""The public front stays light: optional integrations are imported only on demand."""

import ast
import subprocess
import sys
from pathlib import Path


def run_fresh_python(code: str) -> str:
    """Run ``code`` in a new interpreter (so ``sys.modules`` starts empty); its stdout."""
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
    assert out.returncode == 0, out.stdout + out.stderr
    return out.stdout


def test_import_shiftwatch_leaves_optional_integrations_out():
    code = (
        "import sys, shiftwatch\n"
        "heavy = [m for m in ('lightning', 'pytorch_lightning', 'tensorboard', 'matplotlib',"
        " 'scipy', 'torch.utils.tensorboard') if m in sys.modules]\n"
        "print(heavy)\n"
        "assert not heavy, heavy\n"
        "assert sorted(shiftwatch.__all__) == list(shiftwatch.__all__)\n"
    )
    run_fresh_python(code)


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


def test_log_reading_commands_do_not_load_torch(tmp_path):
    """summary, gate, compare and report only read events.jsonl: they must not pay for
    importing PyTorch (measured ~1.3 s and ~190 MB per call here; every reader worker
    process paid it again).  The public names still resolve, on first use."""
    tests = str(Path(__file__).parent)
    code = (
        "import sys, contextlib, io\n"
        f"sys.path.insert(0, {tests!r})\n"
        "from eventlog_factory import write_log\n"
        "from shiftwatch.cli import main\n"
        f"run = {str(tmp_path / 'run')!r}\n"
        "write_log(run)\n"
        "with contextlib.redirect_stdout(io.StringIO()):\n"
        "    codes = [main(['summary', run, '--json']), main(['gate', run, '--fail-on', 'fail']),\n"
        "             main(['compare', run, run, '--json']),\n"
        f"             main(['report', run, '-o', {str(tmp_path / 'r.html')!r}])]\n"
        "print(codes)\n"
        "assert 'torch' not in sys.modules, 'torch was imported'\n"
        "import shiftwatch\n"
        "assert 'torch' not in sys.modules\n"
        "for name in shiftwatch.__all__:\n"
        "    getattr(shiftwatch, name)\n"
        "assert 'torch' in sys.modules and shiftwatch.ShiftMonitor.__name__ == 'ShiftMonitor'\n"
        "from shiftwatch import Summary, summarize\n"
    )
    out = run_fresh_python(code)
    codes = ast.literal_eval(out.strip().splitlines()[-1])
    assert codes[0] == 0 and codes[2] == 0 and codes[3] == 0 and codes[1] in (0, 1)
