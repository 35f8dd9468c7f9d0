"""Safe serving: local by default, origins and a login (or an explicit, warned --no-login) required
to expose it, files only from inside the data folder, no pickle or eval of user data."""
import ast
import re
import subprocess
import sys
import time
import urllib.error
import urllib.parse
import urllib.request
from http.cookiejar import CookieJar
from pathlib import Path

import psutil

ROOT = Path(__file__).resolve().parents[1]
EXE = Path(sys.executable).with_name("cloudsieve")


def _start(args, tmp_path):
    log = open(tmp_path / "serve.log", "w+")
    proc = subprocess.Popen([str(EXE), "serve", "--port", "0", *args], stdout=log, stderr=subprocess.STDOUT,
                            text=True)
    deadline = time.monotonic() + 120
    while time.monotonic() < deadline:
        log.seek(0)
        m = re.search(r"http://([^/]+)/", log.read())
        if m:
            return proc, m.group(1), log
        if proc.poll() is not None:
            break
        time.sleep(0.2)
    log.seek(0)
    proc.kill()
    raise AssertionError(f"server did not start: {log.read()}")


def _stop(proc):
    proc.terminate()
    try:
        proc.wait(timeout=20)
    except subprocess.TimeoutExpired:
        proc.kill()


def test_binds_loopback_only_by_default(tmp_path):
    proc, hostport, _ = _start([], tmp_path)
    try:
        assert hostport.startswith("127.0.0.1:")
        port = int(hostport.split(":")[1])
        listening = [c.laddr for c in psutil.Process(proc.pid).net_connections(kind="inet")
                     if c.status == psutil.CONN_LISTEN]
        assert listening and all(addr.ip == "127.0.0.1" for addr in listening), listening
        with urllib.request.urlopen(f"http://127.0.0.1:{port}/", timeout=120) as r:
            assert r.status == 200 and b"cloudsieve" in r.read()
    finally:
        _stop(proc)


def test_exposing_needs_named_origins(tmp_path):
    out = subprocess.run([str(EXE), "serve", "--address", "0.0.0.0", "--port", "0"], capture_output=True, text=True,
                         timeout=120)
    assert out.returncode == 2
    assert "--allow-websocket-origin" in out.stderr and "Traceback" not in out.stderr


def test_exposing_needs_a_login_or_an_explicit_no_login(tmp_path):
    """Issue 18: a non-loopback address with its origins named but no login is refused (exit 2,
    the two ways out named, no traceback); --no-login and --basic-auth together contradict."""
    base = [str(EXE), "serve", "--address", "0.0.0.0", "--port", "0", "--allow-websocket-origin", "example.org:5006"]
    env = {k: v for k, v in __import__("os").environ.items() if k != "CLOUDSIEVE_BASIC_AUTH"}
    out = subprocess.run(base, capture_output=True, text=True, timeout=120, env=env)
    assert out.returncode == 2, out.stderr
    assert "--basic-auth" in out.stderr and "--no-login" in out.stderr and "Traceback" not in out.stderr
    both = subprocess.run([*base, "--no-login", "--basic-auth", "cloud-sieve-pass"], capture_output=True, text=True,
                          timeout=120, env=env)
    assert both.returncode == 2 and "contradict" in both.stderr


def test_no_login_serves_open_with_a_warning_and_basic_auth_guards_the_network_address(tmp_path):
    """--no-login on 0.0.0.0: the page is served without a login, and a warning is printed at
    start; --basic-auth on 0.0.0.0: no warning, and the page asks for the login."""
    args = ["--address", "0.0.0.0", "--allow-websocket-origin", "example.org:5006"]
    proc, hostport, log = _start([*args, "--no-login"], tmp_path)
    try:
        port = int(hostport.rsplit(":", 1)[1])
        with urllib.request.urlopen(f"http://127.0.0.1:{port}/", timeout=120) as r:
            assert r.status == 200 and "login" not in r.url
        log.seek(0)
        assert "WARNING: serving on 0.0.0.0 without a login" in log.read()
    finally:
        _stop(proc)
    (tmp_path / "second").mkdir()
    proc, hostport, log = _start([*args, "--basic-auth", "cloud-sieve-pass"], tmp_path / "second")
    try:
        port = int(hostport.rsplit(":", 1)[1])
        with urllib.request.urlopen(f"http://127.0.0.1:{port}/", timeout=120) as r:
            assert "login" in r.url
        log.seek(0)
        assert "WARNING" not in log.read()
    finally:
        _stop(proc)


def test_login_with_basic_auth(tmp_path):
    proc, hostport, _ = _start(["--basic-auth", "cloud-sieve-pass", "--cookie-secret", "x" * 32], tmp_path)
    base = f"http://{hostport}"
    try:
        # without logging in the app page is not served: the login form is
        with urllib.request.urlopen(f"{base}/", timeout=120) as r:
            assert "login" in r.url
        jar = CookieJar()
        opener = urllib.request.build_opener(urllib.request.HTTPCookieProcessor(jar))
        bad = urllib.parse.urlencode({"username": "analyst", "password": "wrong-password"}).encode()
        with opener.open(f"{base}/login", data=bad, timeout=120) as r:
            assert "login" in r.url  # refused: back to the form
        good = urllib.parse.urlencode({"username": "analyst", "password": "cloud-sieve-pass"}).encode()
        with opener.open(f"{base}/login", data=good, timeout=120) as r:
            page = r.read()
        assert b"cloudsieve" in page and "login" not in r.url
    finally:
        _stop(proc)


def test_short_password_refused(tmp_path):
    out = subprocess.run([str(EXE), "serve", "--port", "0", "--basic-auth", "abc"], capture_output=True, text=True,
                         timeout=120)
    assert out.returncode == 2 and "at least 8 characters" in out.stderr


def test_no_pickle_or_eval_of_user_data():
    """Static check of our own code: nothing deserialises with pickle or evaluates strings."""
    for path in list((ROOT / "dashboard").rglob("*.py")) + list((ROOT / "physics").rglob("*.py")):
        tree = ast.parse(path.read_text(), filename=str(path))
        for node in ast.walk(tree):
            if isinstance(node, (ast.Import, ast.ImportFrom)):
                names = [a.name for a in node.names] + ([node.module] if isinstance(node, ast.ImportFrom) else [])
                assert not any(n and n.split(".")[0] in ("pickle", "cPickle", "dill", "marshal", "shelve")
                               for n in names), f"{path}: imports a deserialiser"
            if isinstance(node, ast.Call) and isinstance(node.func, ast.Name):
                assert node.func.id not in ("eval", "exec", "compile"), f"{path}:{node.lineno}: {node.func.id}()"
