"""Checks that need no pass over the data run before any: an output folder that cannot be
written, a malformed or silent scheduler address, a seed no output file can store. Each ends in
one line and exit 2 before the data are read (the reader is patched to fail if reached); a
power check shows the same command with the input fixed does reach the data."""

import re
import socket
import time

import arviz as az
import numpy as np
import pytest

from tallchain.app import _cli as cli
from tallchain.app import _service

CONFIG = """\
[data]
x = "X.npy"
y = "y.npy"
[model]
family = "linear"
[sampler]
method = "mala"
chains = 2
draws = 50
warmup = 40
{sampler}
{compute}
"""


class DataRead(AssertionError):
    pass


@pytest.fixture
def config(tmp_path, rng, monkeypatch):
    """A config whose data reader fails if it is reached; ``write(**parts)`` rewrites it."""
    X = rng.standard_normal((200, 2))
    np.save(tmp_path / "X.npy", X)
    np.save(tmp_path / "y.npy", X @ [1.0, -1.0] + rng.standard_normal(200))

    def read(*args, **kwargs):
        raise DataRead("the data were read")

    monkeypatch.setattr(_service, "load_data", read)

    def write(sampler="seed = 1", compute=""):
        path = tmp_path / "run.toml"
        path.write_text(CONFIG.format(sampler=sampler, compute=compute))
        return path

    return write


def _refused(capsys, argv, pattern):
    code = cli.main([str(a) for a in argv])
    err = capsys.readouterr().err
    lines = err.strip().splitlines()
    assert code == 2 and len(lines) == 1 and "Traceback" not in err, err
    assert re.search(pattern, lines[0]), lines[0]
    return lines[0]


def _reaches_the_data(argv):
    with pytest.raises(DataRead):
        cli.main([str(a) for a in argv])


# -- item 4: the output folder ------------------------------------------------------------

def test_an_output_folder_that_cannot_be_created_is_refused_before_the_data(config, tmp_path,
                                                                           capsys):
    path = config()
    # /proc admits no new folders (Linux procfs), for root too.
    _refused(capsys, ["run", path, "--out", "/proc/tallchain-out", "--quiet"],
             r'^tallchain: error: output\.dir \(from the command line\): cannot write to '
             r'"/proc/tallchain-out" \(No such file or directory\); give a folder you can '
             r"create and write to")
    (tmp_path / "a-file").write_text("")
    _refused(capsys, ["run", path, "--out", tmp_path / "a-file" / "out", "--quiet"],
             r"cannot write to .*a-file/out\" \(Not a directory\)")
    _reaches_the_data(["run", path, "--out", tmp_path / "fine", "--quiet"])   # power


def test_the_checking_commands_check_the_output_folder_first(config, capsys):
    path = config()
    for command in ("validate", "sweep", "calibrate"):
        _refused(capsys, [command, path, "--out", "/proc/tallchain-out"],
                 r"^tallchain: error: output\.dir \(from the command line\): cannot write to")


# -- item 5: scheduler addresses ----------------------------------------------------------

@pytest.mark.parametrize("address,problem", [
    ("http://x", r"is not a Dask scheduler address \(unknown scheme 'http'\)"),
    ("tcp://256.1.1.1:99999", r"has an impossible host '256\.1\.1\.1'"),
    ("tcp://127.0.0.1:99999", r"has port '99999', outside 1-65535"),
    ("tcp://127.0.0.1:0", r"has port '0', outside 1-65535"),
    ("tcp://scheduler-host", r"has no host:port after tcp://"),
    ("tcp://-bad-.example:8786", r"has an impossible host '-bad-\.example'"),
    ("inproc://x:1", r"is not a Dask scheduler address \(inproc connects only inside one "
                       r"process\)"),
])
def test_a_malformed_address_is_one_line_before_the_data(config, capsys, address, problem):
    path = config()
    _refused(capsys, ["run", path, "--scheduler", address, "--quiet"],
             rf"^tallchain: error: --scheduler: '{re.escape(address)}' {problem}; give "
             r"scheme://host:port, e.g\. tcp://10\.0\.0\.5:8786")
    compute = f'[compute]\nscheduler = "{address}"'
    _refused(capsys, ["run", config(compute=compute), "--quiet"],
             rf"^tallchain: error: compute\.scheduler: '{re.escape(address)}' {problem}")


def _free_port():
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def test_a_well_formed_address_where_nothing_answers_is_one_line_within_the_timeout(config,
                                                                                   capsys):
    port = _free_port()     # bound and released: nothing listens there
    path = config(compute="[compute]\nconnect_seconds = 0.5")
    _refused(capsys, ["run", path, "--scheduler", f"tcp://127.0.0.1:{port}", "--quiet"],
             rf"^tallchain: error: --scheduler: nothing answered at tcp://127\.0\.0\.1:{port} "
             r"within 0\.5 s \(Connection refused\); start the scheduler or check the address; "
             r"if it is slow to answer, raise compute\.connect_seconds")
    # An address that drops the connection attempt (TEST-NET-1, RFC 5737: never routed) is
    # refused after the stated timeout at most, or at once where the network says so.
    t = time.monotonic()
    _refused(capsys, ["run", path, "--scheduler", "tcp://192.0.2.1:8786", "--quiet"],
             r"nothing answered at tcp://192\.0\.2\.1:8786 within 0\.5 s")
    assert time.monotonic() - t < 5


def test_power_an_address_that_answers_passes_the_probe(config):
    path = config(compute="[compute]\nconnect_seconds = 0.5")
    with socket.socket() as server:
        server.bind(("127.0.0.1", 0))
        server.listen()
        port = server.getsockname()[1]
        _reaches_the_data(["run", path, "--scheduler", f"tcp://127.0.0.1:{port}", "--quiet"])


def test_a_bad_connect_timeout_is_refused(config, capsys):
    _refused(capsys, ["run", config(compute="[compute]\nconnect_seconds = 0"), "--quiet"],
             r"^tallchain: error: compute\.connect_seconds: must be a finite number > 0, got 0")


# -- item 2: seeds ------------------------------------------------------------------------

def test_a_seed_of_2_to_the_70_is_refused_before_any_work(config, capsys):
    message = (r"must be an integer from 0 to 2\*\*64 - 1, got 1180591620717411303424; give an "
               r"integer such as 1")
    _refused(capsys, ["run", config(sampler=f"seed = {2**70}"), "--quiet"],
             rf"^tallchain: error: sampler\.seed: {message}")
    _refused(capsys, ["run", config(), "--seed", str(2**70), "--quiet"],
             rf"^tallchain: error: sampler\.seed \(from the command line\): {message}")
    _reaches_the_data(["run", config(), "--seed", str(2**64 - 1), "--quiet"])   # power


def test_the_largest_seed_is_stored_by_every_output(tmp_path, rng, capsys):
    # The boundary the check keeps: 2**64 - 1 runs and is written to posterior.nc (a NetCDF
    # attribute of type uint64) and run.json, where 2**64 would have no HDF5 type.
    X = rng.standard_normal((200, 2))
    np.save(tmp_path / "X.npy", X)
    np.save(tmp_path / "y.npy", X @ [1.0, -1.0] + rng.standard_normal(200))
    path = tmp_path / "run.toml"
    path.write_text(CONFIG.format(sampler=f"seed = {2**64 - 1}", compute=""))
    assert cli.main(["run", str(path), "--out", str(tmp_path / "o"), "--quiet"]) == 0
    tree = az.from_netcdf(tmp_path / "o" / "posterior.nc")
    assert int(tree["posterior"].attrs["setting_seed"]) == 2**64 - 1
    assert '"seed": 18446744073709551615' in (tmp_path / "o" / "run.json").read_text()


def test_a_listener_that_is_no_scheduler_ends_in_one_line_after_the_stated_timeout(tmp_path, rng,
                                                                                    capsys):
    # The probe's TCP connection succeeds, but nothing speaks Dask's protocol there: the
    # Client gives up after compute.connect_seconds and the run ends in one line, exit 2.
    pytest.importorskip("distributed")
    X = rng.standard_normal((200, 2))
    np.save(tmp_path / "X.npy", X)
    np.save(tmp_path / "y.npy", X @ [1.0, -1.0] + rng.standard_normal(200))
    path = tmp_path / "run.toml"
    path.write_text(CONFIG.format(sampler="seed = 1", compute="[compute]\nconnect_seconds = 1"))
    with socket.socket() as server:
        server.bind(("127.0.0.1", 0))
        server.listen()
        address = f"tcp://127.0.0.1:{server.getsockname()[1]}"
        t = time.monotonic()
        _refused(capsys, ["run", path, "--out", tmp_path / "o", "--scheduler", address,
                          "--quiet"],
                 rf"^tallchain: error: scheduler: could not connect to {re.escape(address)} "
                 r"within 1 s \(.*\); start the scheduler or check the address; if it is slow "
                 r"to answer, raise connect_seconds$")
        assert time.monotonic() - t < 30


def test_power_a_scheduler_at_an_address_runs_the_chains_to_the_threads_draws(tmp_path, rng,
                                                                                capsys):
    # The other side of the refusals above: a real scheduler at a tcp:// address passes the
    # checks and the probe, the Client connects within the timeout, and the chains (one task
    # per chain and round) give the draws of the run in threads, bit for bit (the same kernel
    # from the same states).
    distributed = pytest.importorskip("distributed")
    X = rng.standard_normal((200, 2))
    np.save(tmp_path / "X.npy", X)
    np.save(tmp_path / "y.npy", X @ [1.0, -1.0] + rng.standard_normal(200))
    path = tmp_path / "run.toml"
    path.write_text(CONFIG.format(sampler="seed = 1", compute="[compute]\nconnect_seconds = 20"))
    assert cli.main(["run", str(path), "--out", str(tmp_path / "threads"), "--quiet"]) == 0
    with distributed.LocalCluster(n_workers=1, threads_per_worker=1, processes=False,
                                  protocol="tcp", dashboard_address=":0") as cluster:
        address = cluster.scheduler_address
        assert address.startswith("tcp://")
        code = cli.main(["run", str(path), "--out", str(tmp_path / "dask"), "--scheduler",
                         address, "--quiet"])
    assert code == 0, capsys.readouterr().err
    a = az.from_netcdf(tmp_path / "threads" / "posterior.nc")["posterior"]["beta"].values
    b = az.from_netcdf(tmp_path / "dask" / "posterior.nc")["posterior"]["beta"].values
    assert np.array_equal(a, b)


def test_validate_probes_no_address_it_would_not_use(config, capsys):
    # validate runs its chains in this process: a silent compute.scheduler does not stop it,
    # while sweep, which would use it, is refused before the data (the power of the check).
    path = config(compute=f'[compute]\nscheduler = "tcp://127.0.0.1:{_free_port()}"\n'
                          "connect_seconds = 0.5")
    _reaches_the_data(["validate", path, "--quiet"])
    _refused(capsys, ["sweep", path, "--quiet"],
             r"^tallchain: error: compute\.scheduler: nothing answered at tcp://127\.0\.0\.1")
