"""direct_slot_init: the same constructor as the dataclass's own, only faster."""

from __future__ import annotations

import dataclasses
import inspect
import pickle
from dataclasses import dataclass, field

import pytest
from hypothesis import given
from hypothesis import strategies as st

from qcfit.evaluate import CategoryShift, Finding
from qcfit.slotinit import direct_slot_init


@dataclass(frozen=True, slots=True)
class Plain:
    a: int
    b: str
    c: float = 1.5
    d: tuple[int, ...] = ()
    e: dict = field(default_factory=dict)


@direct_slot_init
@dataclass(frozen=True, slots=True)
class Direct:
    a: int
    b: str
    c: float = 1.5
    d: tuple[int, ...] = ()
    e: dict = field(default_factory=dict)


def test_signature_is_the_dataclass_one() -> None:
    plain = inspect.signature(Plain).parameters
    direct = inspect.signature(Direct).parameters
    assert list(plain) == list(direct)
    for name in ("a", "b", "c", "d"):
        assert plain[name].default == direct[name].default


@given(a=st.integers(), b=st.text(max_size=5),
       rest=st.dictionaries(st.sampled_from(["c", "d", "e"]),
                            st.sampled_from([0.25, (1, 2), {"k": 1}]), max_size=3))
def test_same_values_as_the_dataclass_init(a: int, b: str, rest: dict) -> None:
    got, want = Direct(a, b, **rest), Plain(a, b, **rest)
    assert dataclasses.astuple(got) == dataclasses.astuple(want)
    assert Direct(a=a, b=b, **rest) == got


def test_default_factory_gives_a_fresh_value_each_time() -> None:
    one, two = Direct(1, "x"), Direct(2, "y")
    assert one.e == {} and one.e is not two.e


def test_frozen_replace_pickle_and_errors_are_unchanged() -> None:
    d = Direct(1, "x", d=(3,))
    with pytest.raises(dataclasses.FrozenInstanceError):
        d.a = 2  # type: ignore[misc]
    assert dataclasses.replace(d, c=2.0) == Direct(1, "x", 2.0, (3,))
    assert pickle.loads(pickle.dumps(d)) == d
    with pytest.raises(TypeError, match="missing 1 required positional argument: 'b'"):
        Direct(1)  # type: ignore[call-arg]
    with pytest.raises(TypeError, match="unexpected keyword argument 'z'"):
        Direct(1, "x", z=3)  # type: ignore[call-arg]


def test_refuses_what_it_would_get_wrong() -> None:
    with pytest.raises(TypeError, match="slotted dataclass"):
        direct_slot_init(dataclass(frozen=True)(type("NoSlots", (), {"__annotations__": {"a": int}})))

    @dataclass(frozen=True, slots=True)
    class Post:
        a: int

        def __post_init__(self) -> None:
            pass

    with pytest.raises(TypeError, match="__post_init__"):
        direct_slot_init(Post)


def test_finding_and_category_shift_fields_all_set() -> None:
    kw = {f.name: f"v{i}" for i, f in enumerate(dataclasses.fields(Finding))}
    f = Finding(**kw)
    assert [getattr(f, name) for name in kw] == list(kw.values())
    assert Finding("baseline", "L1", "tested", "r").details == {}
    c = CategoryShift("FL", "up", 4.1, 12, 4.0, 0.3, 0.1)
    assert dataclasses.astuple(c) == ("FL", "up", 4.1, 12, 4.0, 0.3, 0.1)
