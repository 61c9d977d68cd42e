"""The Python bindings against the command line. The reference of every figure here is the
command line's own result with the same options, bit for bit (its prices are checked
against closed forms by the Rust test suite); JSON prints the shortest digits that read back
to the same double, so equal dicts are equal bits."""

import concurrent.futures
import json
import multiprocessing
import subprocess

import pytest

import pathfold

AUTOCALL = "payoffs/worst_of_autocall.payoff"


def run_cli(cli, *args):
    out = subprocess.run([cli, *args], capture_output=True, text=True, check=False)
    assert out.returncode == 0, out.stderr
    return json.loads(out.stdout)


def without_time(result):
    result = dict(result)
    result.pop("elapsed_seconds", None)
    return result


def test_price_gives_the_command_lines_json(cli):
    mine = pathfold.price(AUTOCALL, paths=20_000, seed=3, set={"coupon": "2.5%"})
    theirs = run_cli(cli, "price", AUTOCALL, "--paths", "20000", "--seed", "3", "--set", "coupon=2.5%",
                     "--format", "json")
    assert list(mine) == list(theirs), "the same keys, in the same order"
    assert without_time(mine) == without_time(theirs)


def test_price_text_prices_the_text_as_the_file(cli):
    with open("payoffs/european_call.payoff", encoding="utf-8") as f:
        text = f.read()
    mine = pathfold.price_text(text, market="payoffs/market.toml", paths=10_000, antithetic=False)
    theirs = run_cli(cli, "price", "payoffs/european_call.payoff", "--market", "payoffs/market.toml",
                     "--paths", "10000", "--no-antithetic", "--format", "json")
    for key in ("price", "std_error", "profile", "reproduce", "controls"):
        if key == "reproduce":
            mine[key].pop("market_file"), theirs[key].pop("market_file")
        assert mine[key] == theirs[key], key
    assert mine["file"] == "<text>"


def test_errors_raise_with_file_line_and_column():
    with pytest.raises(pathfold.PathfoldError, match=r"^<text>:\d+:\d+: ") as error:
        pathfold.price_text('product "x"\ncurrency USD\nunderlyings ZPHX\nat 1y { pay max(perf(ZPHX) - 1, 0 }\n',
                            market="payoffs/market.toml")
    assert "fix" in str(error.value)
    with pytest.raises(pathfold.PathfoldError, match="no-such.payoff"):
        pathfold.price("no-such.payoff")
    with pytest.raises(pathfold.PathfoldError, match="--paths"):
        pathfold.price(AUTOCALL, paths=10)
    with pytest.raises(pathfold.PathfoldError, match="give the part as K/N"):
        pathfold.price_part(AUTOCALL, "0/4")


def test_parts_run_on_a_pool_merge_to_the_single_runs_bits(cli):
    options = dict(paths=30_000, seed=5)
    # Separate processes, as a cluster's workers would be.
    spawn = multiprocessing.get_context("spawn")
    with concurrent.futures.ProcessPoolExecutor(max_workers=2, mp_context=spawn) as pool:
        futures = [pool.submit(pathfold.price_part, AUTOCALL, (k, 6), **options) for k in range(1, 7)]
        parts = [f.result() for f in futures]
    merged = pathfold.merge(reversed(parts))
    single = pathfold.price(AUTOCALL, **options)
    assert without_time(merged) == without_time(single)
    assert without_time(single) == without_time(run_cli(cli, "price", AUTOCALL, "--paths", "30000", "--seed", "5",
                                                        "--format", "json"))


def test_parts_written_by_the_command_line_merge_in_python(cli, tmp_path):
    files = []
    for k in (1, 2, 3):
        out = tmp_path / f"part-{k}.json"
        subprocess.run([cli, "price", AUTOCALL, "--paths", "8000", "--part", f"{k}/3", "--output", str(out)],
                       check=True)
        files.append(out)
    assert without_time(pathfold.merge(files)) == without_time(pathfold.price(AUTOCALL, paths=8000))


def test_parts_that_do_not_belong_together_are_refused():
    parts = [pathfold.price_part(AUTOCALL, (k, 3), paths=4096) for k in (1, 2, 3)]
    with pytest.raises(pathfold.PathfoldError, match="missing part 2/3"):
        pathfold.merge([parts[0], parts[2]])
    other = pathfold.price_part(AUTOCALL, (2, 3), paths=4096, seed=9)
    with pytest.raises(pathfold.PathfoldError, match=r"parts\[1\] \(part 2/3\) does not belong.*seed is 9, not 1"):
        pathfold.merge([parts[0], other, parts[2]])


def test_check_gives_the_command_lines_json(cli):
    mine = pathfold.check(paths=20_000)
    theirs = run_cli(cli, "check", "--paths", "20000", "--format", "json")
    assert mine == theirs


def test_compare_gives_the_command_lines_json(cli, tmp_path):
    prices = tmp_path / "prices.csv"
    prices.write_text("file,price\ncall.payoff,12.0\ndigital.payoff,0.4\n")
    mine = pathfold.compare(prices, ["tests/compare"], paths=10_000)
    out = subprocess.run([cli, "compare", str(prices), "tests/compare", "--paths", "10000", "--format", "json"],
                         capture_output=True, text=True, check=False)
    theirs = json.loads(out.stdout)
    for report in (mine, theirs):
        for line in report["comparisons"]:
            if line.get("result"):
                line["result"].pop("elapsed_seconds")
    assert mine == theirs


def test_a_pool_forked_after_a_call_still_prices(cli):
    # On Linux a process pool forks by default: the children must not inherit a thread
    # pool without its threads (each call has its own pool).
    single = pathfold.price(AUTOCALL, paths=8192)
    fork = multiprocessing.get_context("fork")
    with concurrent.futures.ProcessPoolExecutor(max_workers=2, mp_context=fork) as pool:
        futures = [pool.submit(pathfold.price_part, AUTOCALL, (k, 4), paths=8192) for k in range(1, 5)]
        parts = [f.result(timeout=120) for f in futures]
    assert without_time(pathfold.merge(parts)) == without_time(single)


@pytest.mark.parametrize("payoff, extra", [
    # Early exercise: the issuer's call fitted by Longstaff-Schwartz before pricing.
    ("payoffs/callable_autocall.payoff", []),
    # A seasoned trade on curves: past fixings, a calendar, term structures.
    ("payoffs/seasoned_worst_of_autocall.payoff", []),
    # An autocallable without antithetic pairs: its paths stop being simulated when they end.
    (AUTOCALL, ["--no-antithetic"]),
    # Payments at the touch and continuous extremes, drawn between grid dates.
    ("payoffs/knock_out_note.payoff", []),
])
def test_the_newer_features_price_as_on_the_command_line(cli, payoff, extra):
    antithetic = "--no-antithetic" not in extra
    mine = pathfold.price(payoff, paths=20_000, seed=5, antithetic=antithetic)
    theirs = run_cli(cli, "price", payoff, "--paths", "20000", "--seed", "5", "--format", "json", *extra)
    assert without_time(mine) == without_time(theirs)


def test_the_sobol_sampler_prices_as_on_the_command_line(cli):
    mine = pathfold.price(AUTOCALL, paths=16_384, seed=2, sampler="sobol")
    theirs = run_cli(cli, "price", AUTOCALL, "--paths", "16384", "--seed", "2", "--sampler", "sobol",
                     "--format", "json")
    assert without_time(mine) == without_time(theirs)
    with pytest.raises(pathfold.PathfoldError, match="sobol"):
        pathfold.price(AUTOCALL, paths=16_384, sampler="quasi")
