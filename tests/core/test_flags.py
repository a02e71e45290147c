"""service/core/flags.py: names of set bits, and the shared-mask codes columnar writers use."""

import enum

import numpy as np
import orjson

from service.core.flags import FlagNameList, flag_names


class Demo(enum.IntFlag):
    FIRST = 1
    SECOND = 2
    THIRD = 4


def test_names_in_declaration_order_and_codes_match():
    masks = np.array([0, 3, 4, 3, 0, 7])
    names = flag_names(masks, Demo)
    expected = [(), ("first", "second"), ("third",), ("first", "second"), (),
                ("first", "second", "third")]  # fmt: skip
    assert names == expected
    assert isinstance(names, FlagNameList)
    # Every star's tuple is the distinct tuple its code points at.
    assert [names.distinct[k] for k in names.codes] == expected
    # JSON writers see a plain list of lists.
    assert orjson.loads(orjson.dumps(names)) == [list(t) for t in expected]


def test_no_flags_at_all():
    names = flag_names(np.zeros(4, dtype=np.int64), Demo)
    assert names == [()] * 4 and names.distinct == [()] and list(names.codes) == [0] * 4


def test_changing_the_list_drops_the_codes():
    for change in (
        lambda x: x.__setitem__(0, ("first", "extra")),
        lambda x: x.append(()),
        lambda x: x.extend([()]),
        lambda x: x.pop(),
        lambda x: x.sort(),
        lambda x: x.reverse(),
        lambda x: x.__delitem__(0),
        lambda x: x.__iadd__([()]),
    ):
        names = flag_names(np.array([1, 2, 1]), Demo)
        assert names.codes is not None
        change(names)
        assert names.codes is None
