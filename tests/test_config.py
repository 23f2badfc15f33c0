"""Pool configuration: every mistake names the file, the key and a fix."""
from __future__ import annotations

from pathlib import Path

import pytest

from gateway import config
from gateway.errors import ConfigError


def write(tmp_path: Path, pool: str, stores: str | None = None, extra: str = "") -> Path:
    if stores is None:
        stores = "".join(f'[[store]]\npath = "s{i}"\n' for i in range(6))
    p = tmp_path / "pool.toml"
    p.write_text(f"[pool]\n{pool}\n{stores}\n{extra}")
    return p


BASE = 'name = "lab"\nk = 4\nn = 6\nstate_dir = "state"'


def test_defaults(tmp_path):
    cfg = config.load(write(tmp_path, BASE))
    assert (cfg.name, cfg.k, cfg.n, cfg.write_quorum) == ("lab", 4, 6, 5)  # w defaults to min(k+1, n)
    assert cfg.stripe_size == 4 * 1024 * 1024
    assert cfg.state_dir == (tmp_path / "state").resolve()
    assert [s.path for s in cfg.stores] == [(tmp_path / f"s{i}").resolve() for i in range(6)]
    assert len(cfg.domains) == 6  # one domain per store by default
    assert cfg.repair.rate == 64 * 1024 * 1024 and cfg.repair.grace == 1800
    assert cfg.scrub.interval == 7 * 86400
    assert cfg.metrics.listen == "127.0.0.1:9851"


@pytest.mark.parametrize("text, bytes_", [("4MiB", 4 << 20), ("64KiB", 64 << 10), ("1GiB", 1 << 30),
                                          ("8192", 8192), ("2 MB", 2_000_000)])
def test_sizes(text, bytes_):
    assert config.parse_size(text) == bytes_


def test_w_equal_n_and_k(tmp_path):
    assert config.load(write(tmp_path, BASE + "\nwrite_quorum = 6")).w == 6
    assert config.load(write(tmp_path, BASE + "\nwrite_quorum = 4")).w == 4
    one = 'name = "lab"\nk = 6\nn = 6\nstate_dir = "state"'
    assert config.load(write(tmp_path, one)).w == 6  # min(k+1, n)


@pytest.mark.parametrize("pool, key, words", [
    ('name = "lab"\nk = 0\nn = 6\nstate_dir = "s"', "pool.k", "at least 1"),
    ('name = "lab"\nk = 4\nn = 3\nstate_dir = "s"', "pool.n", "less than k"),
    ('name = "lab"\nk = 4\nn = 256\nstate_dir = "s"', "pool.n", "255"),
    (BASE + "\nwrite_quorum = 3", "pool.write_quorum", "between"),
    (BASE + "\nwrite_quorum = 7", "pool.write_quorum", "between"),
    (BASE + '\nstripe_size = "3000"', "pool.stripe_size", "multiple of 4KiB"),
    (BASE + '\nstripe_size = "lots"', "pool.stripe_size", "not a size"),
    (BASE + "\nk = 4", "(syntax)", "TOML"),
    ('k = 4\nn = 6\nstate_dir = "s"', "pool.name", "required"),
    (BASE + "\nsurprise = 1", "pool.surprise", "not a known key"),
    (BASE + '\nk2 = "x"', "pool.k2", "not a known key"),
])
def test_pool_mistakes(tmp_path, pool, key, words):
    path = write(tmp_path, pool)
    with pytest.raises(ConfigError) as e:
        config.load(path)
    msg = str(e.value)
    assert str(path) in msg and key in msg and words in msg


def test_too_few_stores(tmp_path):
    path = write(tmp_path, BASE, "".join(f'[[store]]\npath = "s{i}"\n' for i in range(5)))
    with pytest.raises(ConfigError, match=r"5 stores, fewer than n = 6.*add 1 more"):
        config.load(path)


def test_duplicate_store(tmp_path):
    stores = "".join(f'[[store]]\npath = "s{i}"\n' for i in range(5)) + '[[store]]\npath = "./s1"\n'
    with pytest.raises(ConfigError, match=r"store\[5\]\.path.*already store\[1\]"):
        config.load(write(tmp_path, BASE, stores))


def test_nested_store(tmp_path):
    stores = "".join(f'[[store]]\npath = "s{i}"\n' for i in range(5)) + '[[store]]\npath = "s1/inner"\n'
    with pytest.raises(ConfigError, match=r"lies inside store\[1\]"):
        config.load(write(tmp_path, BASE, stores))


def test_store_inside_state_dir(tmp_path):
    stores = "".join(f'[[store]]\npath = "s{i}"\n' for i in range(5)) + '[[store]]\npath = "state/x"\n'
    with pytest.raises(ConfigError, match=r"overlaps state_dir"):
        config.load(write(tmp_path, BASE, stores))


def test_domains_that_cannot_hold_n(tmp_path):
    # Two domains must take up to 3 of 6 shards each; a 5+1 split holds only 4.
    stores = "".join(f'[[store]]\npath = "s{i}"\ndomain = "{"a" if i < 5 else "b"}"\n' for i in range(6))
    with pytest.raises(ConfigError, match=r"store\.domain.*2 shard\(s\) short"):
        config.load(write(tmp_path, BASE, stores))


def test_three_equal_domains_ok(tmp_path):
    pool = 'name = "lab"\nk = 5\nn = 9\nwrite_quorum = 6\nstate_dir = "state"'
    stores = "".join(f'[[store]]\npath = "s{i}"\ndomain = "room-{i // 3}"\n' for i in range(9))
    cfg = config.load(write(tmp_path, pool, stores))
    assert cfg.domains == {"room-0": 3, "room-1": 3, "room-2": 3}
    assert config.spread_cap(cfg.n, len(cfg.domains)) == 3


def test_missing_file(tmp_path):
    with pytest.raises(ConfigError, match="does not exist"):
        config.load(tmp_path / "nope.toml")


def test_sections(tmp_path):
    cfg = config.load(write(tmp_path, BASE, extra='[repair]\nrate = "0"\ngrace = "5m"\n[metrics]\nlisten = false\n'
                                                  '[store_io]\ndeadline = "2s"\n[scrub]\ninterval = "1d"\n'))
    assert cfg.repair.rate == 0 and cfg.repair.grace == 300
    assert cfg.metrics.listen is None
    assert cfg.store_io.deadline == 2.0 and cfg.scrub.interval == 86400
    with pytest.raises(ConfigError, match=r"repair\.speed.*not a known key"):
        config.load(write(tmp_path, BASE, extra="[repair]\nspeed = 3\n"))
    with pytest.raises(ConfigError, match=r"metrics\.listen.*host:port"):
        config.load(write(tmp_path, BASE, extra='[metrics]\nlisten = "everywhere"\n'))


@pytest.mark.parametrize("name", ["six-disks.toml", "three-rooms.toml"])
def test_shipped_examples_load(name):
    cfg = config.load(Path(__file__).parent.parent / "config" / name)
    assert cfg.k <= cfg.write_quorum <= cfg.n <= len(cfg.stores)
