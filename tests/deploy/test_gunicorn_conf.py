"""deploy/gunicorn.conf.py: settings from the environment, and the metrics hooks."""

import pathlib
import runpy

import pytest

ROOT = pathlib.Path(__file__).resolve().parents[2]
CONF = str(ROOT / "deploy" / "gunicorn.conf.py")


@pytest.fixture()
def load(monkeypatch, tmp_path):
    monkeypatch.setenv("PROMETHEUS_MULTIPROC_DIR", str(tmp_path))

    def _load(**env):
        for k, v in env.items():
            monkeypatch.setenv(k, v)
        return runpy.run_path(CONF)

    return _load


def test_defaults(load):
    conf = load()
    assert conf["bind"] == "127.0.0.1:8000"
    assert conf["workers"] >= 1
    # gthread with per-request read limits (service/workers.py)
    assert conf["worker_class"] == "service.workers.ReadDeadlineThreadWorker"
    assert conf["threads"] == 2
    assert conf["preload_app"] is True
    assert conf["max_requests"] > 0 and 0 < conf["max_requests_jitter"] < conf["max_requests"]
    assert conf["graceful_timeout"] > 0
    assert conf["logger_class"] == "service.gunicorn_log.JsonLogger"


def test_environment_overrides(load):
    conf = load(
        SKYDRIFT_BIND="0.0.0.0:9000",
        SKYDRIFT_WORKERS="3",
        SKYDRIFT_WORKER_CLASS="sync",
        SKYDRIFT_GRACEFUL_TIMEOUT_S="15",
        SKYDRIFT_MAX_REQUESTS="100",
        SKYDRIFT_MAX_REQUESTS_JITTER="10",
    )
    assert conf["bind"] == "0.0.0.0:9000" and conf["workers"] == 3
    assert conf["worker_class"] == "sync" and conf["graceful_timeout"] == 15
    assert (conf["max_requests"], conf["max_requests_jitter"]) == (100, 10)


def test_worker_timeout_stays_above_the_request_time_limit(load):
    conf = load(SKYDRIFT_REQUEST_TIMEOUT_S="300", SKYDRIFT_TIMEOUT_S="120")
    assert conf["timeout"] >= 310


def test_child_exit_marks_the_worker_dead_for_metrics(load, tmp_path):
    from prometheus_client import CollectorRegistry, generate_latest, multiprocess
    from prometheus_client.mmap_dict import MmapedDict, mmap_key

    conf = load()
    key = mmap_key("skydrift_http_requests", "skydrift_http_requests_total", ["e"], ["/x"], "h")

    def counter_file(pid, value):
        d = MmapedDict(str(tmp_path / f"counter_{pid}.db"))
        d.write_value(key, value, 0.0)
        d.close()

    def total():
        registry = CollectorRegistry()
        multiprocess.MultiProcessCollector(registry, path=str(tmp_path))
        line = next(
            ln for ln in generate_latest(registry).decode().splitlines() if ln.startswith("sky")
        )
        return float(line.split()[-1])

    class Worker:
        pid = 4242

    # A live gauge file of the worker is removed (prometheus-client's mark_process_dead);
    # its counts still count, now added into one file with those of other dead workers.
    counter_file(4242, 5.0)
    counter_file(7, 2.0)  # a live worker
    (tmp_path / "gauge_livesum_4242.db").write_bytes(b"")
    conf["child_exit"](None, Worker())
    assert not (tmp_path / "gauge_livesum_4242.db").exists()
    assert not (tmp_path / "counter_4242.db").exists()
    assert total() == 7.0
    for pid in (4243, 4244):  # two more restarts: still one file for the dead
        counter_file(pid, 1.0)
        Worker.pid = pid
        conf["child_exit"](None, Worker())
    assert sorted(p.name for p in tmp_path.glob("counter_*.db")) == [
        "counter_7.db",
        "counter_deadworkers.db",
    ]
    assert total() == 9.0


def test_on_starting_clears_old_metrics(load, tmp_path):
    conf = load()
    (tmp_path / "counter_1.db").write_bytes(b"")
    conf["on_starting"](None)
    assert not list(tmp_path.glob("*.db"))


def test_worker_nice_setting(load):
    assert load()["worker_nice"] == 0
    assert load(SKYDRIFT_WORKER_NICE="10")["worker_nice"] == 10
    with pytest.raises(SystemExit, match="SKYDRIFT_WORKER_NICE"):
        load(SKYDRIFT_WORKER_NICE="25")


@pytest.mark.parametrize(
    ("name", "value"),
    [
        ("SKYDRIFT_WORKERS", "abc"),
        ("SKYDRIFT_WORKERS", "0"),  # gunicorn would start with no worker and answer nothing
        ("SKYDRIFT_THREADS", "0"),  # every gthread worker would fail to boot, over and over
        ("SKYDRIFT_TIMEOUT_S", "two minutes"),
        ("SKYDRIFT_GRACEFUL_TIMEOUT_S", "-1"),
        ("SKYDRIFT_KEEPALIVE_S", "abc"),
        ("SKYDRIFT_MAX_REQUESTS", "1e4"),
        ("SKYDRIFT_MAX_REQUESTS_JITTER", "-5"),
        # read by each worker (service/workers.py): every worker exited as it booted, over
        # and over, while the server kept listening and answered nothing
        ("SKYDRIFT_CLIENT_IDLE_TIMEOUT_S", "abc"),
        ("SKYDRIFT_REQUEST_READ_TIMEOUT_S", "0"),
        ("SKYDRIFT_REQUEST_READ_TIMEOUT_S", "nan"),
        # int() and float() read these; an operator's typing mistake is not a number
        ("SKYDRIFT_WORKERS", "1_6"),
        ("SKYDRIFT_THREADS", "\u0664"),  # Arabic-Indic 4
        ("SKYDRIFT_TIMEOUT_S", "+120"),  # no setting here is negative: no sign
        ("SKYDRIFT_MAX_REQUESTS", "20_000"),
        ("SKYDRIFT_WORKER_NICE", "\uff11\uff10"),  # fullwidth 10
        ("SKYDRIFT_CLIENT_IDLE_TIMEOUT_S", "1_0"),
        ("SKYDRIFT_REQUEST_READ_TIMEOUT_S", "\u0666\u0660"),  # Arabic-Indic 60
        ("SKYDRIFT_REQUEST_READ_TIMEOUT_S", "+60"),
        # gunicorn stopped with a traceback as the first worker booted
        ("SKYDRIFT_WORKER_TMP_DIR", "/no/such/folder"),
        ("SKYDRIFT_WORKER_TMP_DIR", str(ROOT / "README.md")),
        # gunicorn stopped with a traceback (a port out of range, an unknown worker class)
        # or with a message naming no setting (a bad port, proxy address or log file)
        ("SKYDRIFT_BIND", "127.0.0.1:99999"),
        ("SKYDRIFT_BIND", "127.0.0.1:http"),
        ("SKYDRIFT_WORKER_CLASS", "gthraed"),
        ("SKYDRIFT_WORKER_CLASS", "service.workers.NoSuchWorker"),
        ("SKYDRIFT_FORWARDED_ALLOW_IPS", "10.0.0.0/8,proxy.example.org"),
        ("SKYDRIFT_ACCESS_LOG", "/no/such/folder/access.log"),
    ],
)
def test_bad_process_settings_stop_the_start_with_one_line_naming_them(load, name, value):
    # SystemExit with a message: gunicorn lets it through its "Failed to read config file"
    # traceback, so the operator sees this one line and exit status 1.
    with pytest.raises(SystemExit, match=name) as info:
        load(**{name: value})
    assert "\n" not in str(info.value)


@pytest.mark.parametrize("where", ["file", "missing"])
def test_unusable_metrics_folder_stops_the_start_with_one_line(monkeypatch, tmp_path, where):
    # A file where the folder should be, or a folder that cannot be made (here under a file;
    # in a container, a read-only root with no tmpfs on /tmp): it was a traceback.
    (tmp_path / "a_file").write_text("")
    folder = tmp_path / "a_file" / ("" if where == "file" else "metrics")
    monkeypatch.setenv("PROMETHEUS_MULTIPROC_DIR", str(folder))
    with pytest.raises(SystemExit, match="PROMETHEUS_MULTIPROC_DIR") as info:
        runpy.run_path(CONF)
    assert "\n" not in str(info.value)


def test_good_process_settings_are_kept(load, tmp_path):
    conf = load(
        SKYDRIFT_BIND="[::1]:8080",
        SKYDRIFT_WORKER_CLASS="service.workers.ReadDeadlineSyncWorker",
        SKYDRIFT_FORWARDED_ALLOW_IPS="10.0.0.0/8, 127.0.0.1",
        SKYDRIFT_ACCESS_LOG=str(tmp_path / "access.log"),
    )
    assert conf["bind"] == "[::1]:8080"
    assert conf["worker_class"] == "service.workers.ReadDeadlineSyncWorker"
    assert conf["forwarded_allow_ips"] == "10.0.0.0/8, 127.0.0.1"
    assert conf["accesslog"] == str(tmp_path / "access.log")
    assert load(SKYDRIFT_BIND="unix:/tmp/skydrift.sock")["bind"] == "unix:/tmp/skydrift.sock"
    assert load(SKYDRIFT_WORKERS=" 3 ", SKYDRIFT_CLIENT_IDLE_TIMEOUT_S="2.5e1")["workers"] == 3


def test_bad_application_setting_under_gunicorn_is_one_line(tmp_path):
    import os
    import subprocess
    import sys

    # What gunicorn does with preload_app: import service.wsgi in the master.
    env = dict(os.environ, SKYDRIFT_MAX_STARS="many", PYTHONPATH=str(ROOT))
    out = subprocess.run(
        [sys.executable, "-c", "import service.wsgi"],
        env=env,
        capture_output=True,
        text=True,
        cwd=tmp_path,
    )
    assert out.returncode == 1
    assert "Traceback" not in out.stderr
    assert out.stderr.strip().splitlines() == [
        "skydrift: bad setting: SKYDRIFT_MAX_STARS='many': expected a whole number in ASCII "
        "digits, without a sign"
    ]


def test_served_process_keeps_the_default_outlines_from_the_start(tmp_path):
    import os
    import subprocess
    import sys

    # What gunicorn's master imports (preload_app): afterwards every boundary edge of the
    # default outline settings is kept, and the default outlines need no new edge; the
    # command line's local mode, which builds the application alone, keeps none.
    code = (
        "import sys\n"
        "from service.core import constellations as C\n"
        "if sys.argv[1] == 'served':\n"
        "    import service.wsgi\n"
        "else:\n"
        "    from service.api import create_app; create_app()\n"
        "kept = C._densified_edges('icrs', None, 'fk4', C.DEFAULT_OUTLINE_TOLERANCE_ARCSEC)\n"
        "print(len(kept), C._edge_table()[0].size)\n"
    )
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    counts = {}
    for mode in ("served", "local"):
        out = subprocess.run(
            [sys.executable, "-c", code, mode], env=env, capture_output=True, text=True,
            cwd=tmp_path, check=True,
        )  # fmt: skip
        counts[mode] = [int(x) for x in out.stdout.split()]
    kept, edges = counts["served"]
    assert kept == edges > 5000
    assert counts["local"][0] == 0


def test_post_fork_lowers_the_worker_priority(load):
    import os
    import subprocess
    import sys

    # In a child process (the priority of this one must not change): the hook as gunicorn
    # calls it after forking a worker, then the kernel's view of the child's niceness.
    code = (
        "import os, runpy; conf = runpy.run_path(os.environ['CONF']); "
        "conf['post_fork'](None, None); print(os.getpriority(os.PRIO_PROCESS, 0))"
    )
    env = dict(os.environ, CONF=CONF, SKYDRIFT_WORKER_NICE="7")
    out = subprocess.run(
        [sys.executable, "-c", code], env=env, capture_output=True, text=True, check=True
    )
    assert int(out.stdout.strip()) == max(7, os.getpriority(os.PRIO_PROCESS, 0))
