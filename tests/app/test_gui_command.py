"""`longrun gui`: the screenshot mode (offscreen and in a real X window), start-up choices."""
import os
import shutil
import subprocess
import sys
import time
from pathlib import Path

import pytest
from PySide6.QtGui import QImage

from core.cli import main

REPO = Path(__file__).resolve().parents[2]
SAMPLES = REPO / "sample_models"


def image_is_a_window(path: Path, size, stdout: str):
    img = QImage(str(path))
    assert not img.isNull()
    # the requested size, or larger when the docked panels need more room; as reported
    assert img.width() >= size[0] and img.height() >= size[1]
    assert f"({img.width()}x{img.height()})" in stdout
    colours = {img.pixel(x, y) for x in range(0, img.width(), 7) for y in range(0, img.height(), 7)}
    assert len(colours) > 50, "the picture is (nearly) blank"
    return img


def run_longrun(args, env, timeout=120):
    return subprocess.run([sys.executable, "-m", "core", *args], cwd=str(REPO), env=env,
                          capture_output=True, text=True, timeout=timeout)


@pytest.mark.timeout(150)
def test_screenshot_offscreen(tmp_path):
    out = tmp_path / "shot.png"
    env = dict(os.environ, QT_QPA_PLATFORM="offscreen")
    r = run_longrun(["gui", str(SAMPLES / "pump_wear.json"), "--screenshot", str(out), "--size", "1000x700"], env)
    assert r.returncode == 0, r.stderr
    assert f"wrote {out}" in r.stdout
    img = image_is_a_window(out, (1000, 700), r.stdout)
    # the canvas shows closed-class states: Okabe-Ito blue outlines somewhere in the picture
    blue = (0x00, 0x72, 0xB2)
    found = any(
        (lambda c: abs(c.red() - blue[0]) < 8 and abs(c.green() - blue[1]) < 8 and abs(c.blue() - blue[2]) < 8)(
            img.pixelColor(x, y))
        for x in range(0, img.width(), 2) for y in range(0, img.height(), 2))
    assert found


def test_screenshot_refuses_bad_file_and_bad_options(tmp_path, capsys):
    bad = tmp_path / "bad.json"
    bad.write_text("{not json", encoding="utf-8")
    assert main(["gui", str(bad), "--screenshot", str(tmp_path / "x.png")]) == 2
    err = capsys.readouterr().err
    assert "bad.json" in err and "not valid JSON" in err
    assert not (tmp_path / "x.png").exists()
    assert main(["gui", str(SAMPLES / "pump_wear.json"), "--screenshot", str(tmp_path / "x.gif")]) == 2
    assert "must end in .png" in capsys.readouterr().err
    with pytest.raises(SystemExit) as exc:
        main(["gui", "--size", "big"])
    assert exc.value.code == 2
    assert "not a size" in capsys.readouterr().err


def test_shipped_sample_matches_the_repository_sample():
    from app.main import sample_model_path

    shipped = REPO / "app" / "resources" / "pump_wear.json"
    assert shipped.read_bytes() == (SAMPLES / "pump_wear.json").read_bytes()
    assert sample_model_path() == SAMPLES / "pump_wear.json"


def test_first_start_opens_the_sample_then_not_again(qtbot, monkeypatch, dialogs):
    """run_gui without a file: the sample the first time, an empty chain afterwards."""
    from PySide6.QtWidgets import QApplication

    from app import main as app_main
    from app.settings import Settings
    from app.window import MainWindow

    seen = []

    def fake_exec():
        for w in QApplication.topLevelWidgets():
            if isinstance(w, MainWindow) and not w._closed:
                seen.append((w.document.chain.n, w.document.path))
                w.close()
        return 0

    app = app_main.create_application()
    monkeypatch.setattr(app, "exec", fake_exec)
    assert app_main.run_gui(None) == 0
    assert app_main.run_gui(None) == 0
    assert seen[0] == (4, None)  # the sample opens as an untitled copy: Save never overwrites it
    assert seen[1] == (0, None)
    assert Settings().get("session/first_run_done") is True


@pytest.mark.xvfb
@pytest.mark.timeout(180)
def test_screenshot_in_a_real_x_window(tmp_path):
    xvfb = shutil.which("Xvfb")
    if xvfb is None:
        pytest.skip("Xvfb is not installed (.ci/run installs it)")
    display = f":{90 + os.getpid() % 400}"
    server = subprocess.Popen([xvfb, display, "-screen", "0", "1280x900x24", "-nolisten", "tcp"],
                              stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    try:
        sock = Path(f"/tmp/.X11-unix/X{display[1:]}")
        deadline = time.monotonic() + 20
        while not sock.exists() and server.poll() is None and time.monotonic() < deadline:
            time.sleep(0.05)
        assert server.poll() is None, server.stderr.read().decode(errors="replace")
        assert sock.exists(), "Xvfb did not start"
        out = tmp_path / "xcb.png"
        env = dict(os.environ, DISPLAY=display, QT_QPA_PLATFORM="xcb")
        env.pop("WAYLAND_DISPLAY", None)
        r = run_longrun(["gui", str(SAMPLES / "pump_wear.json"), "--screenshot", str(out), "--size", "1100x760"],
                        env)
        assert r.returncode == 0, r.stderr
        image_is_a_window(out, (1100, 760), r.stdout)
    finally:
        server.terminate()
        try:
            server.wait(10)
        except subprocess.TimeoutExpired:
            server.kill()
            server.wait(10)
        server.stderr.close()
