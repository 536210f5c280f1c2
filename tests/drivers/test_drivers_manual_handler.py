"""The manual handler: the operator seats parts and types ids; scripted answers stand in."""

from __future__ import annotations

import pytest

from drivers.errors import RequestRefused
from drivers.handler import ManualHandler, PartHandler


class Operator:
    """Answers prompts from a script and records everything the station said."""

    def __init__(self, answers: list[str]) -> None:
        self.answers = list(answers)
        self.prompts: list[str] = []
        self.told: list[str] = []

    def ask(self, prompt: str) -> str:
        self.prompts.append(prompt)
        if not self.answers:
            raise AssertionError(f"unexpected prompt: {prompt}")
        return self.answers.pop(0)

    def tell(self, text: str) -> None:
        self.told.append(text)


def make(sites: int, answers: list[str]) -> tuple[ManualHandler, Operator]:
    operator = Operator(answers)
    return ManualHandler(sites, operator.ask, operator.tell), operator


def test_is_a_part_handler():
    handler, _ = make(1, [])
    assert isinstance(handler, PartHandler) and handler.sites() == 1


def test_indexes_then_end_of_lot_on_empty_site_1():
    handler, operator = make(2, ["P1", "P2", "P3", "-", ""])
    assert handler.next_index() == ["P1", "P2"]
    assert handler.next_index() == ["P3", None]
    assert handler.next_index() is None
    assert not operator.answers and "site 1" in operator.prompts[0]


def test_duplicate_in_index_is_refused_and_asked_again():
    handler, operator = make(2, ["P1", "P1", "P2"])
    assert handler.next_index() == ["P1", "P2"]
    assert len(operator.told) == 1 and "already seated" in operator.told[0]
    assert "site 2" in operator.prompts[1].lower() and "site 2" in operator.prompts[2].lower()


def test_id_tested_earlier_in_lot_is_refused():
    handler, operator = make(1, ["P1", "P1", "P9"])
    assert handler.next_index() == ["P1"]
    assert handler.next_index() == ["P9"]
    assert any("already tested" in line for line in operator.told)


def test_empty_answer_for_a_later_site_is_refused():
    handler, operator = make(2, ["P1", "", "  P2  "])
    assert handler.next_index() == ["P1", "P2"]
    assert any("no id typed" in line for line in operator.told)


def test_index_with_no_part_is_asked_again():
    handler, operator = make(2, ["-", "-", "P5", "-"])
    assert handler.next_index() == ["P5", None]
    assert any("No part seated" in line for line in operator.told)


def test_assign_bin_tells_part_and_bin():
    handler, operator = make(2, ["A7", "A8"])
    handler.next_index()
    handler.assign_bin(2, 3, "fail cmrr")
    assert operator.told[-1] == "Site 2: put the part 'A8' in bin 3 (fail cmrr)."


def test_assign_bin_refuses_bad_site_and_bin():
    handler, operator = make(2, ["A7", "A8"])
    handler.next_index()
    with pytest.raises(RequestRefused):
        handler.assign_bin(3, 1)
    with pytest.raises(RequestRefused):
        handler.assign_bin(1, 100)
    assert operator.told == []


def test_reseat_waits_for_enter():
    handler, operator = make(1, ["A1", ""])
    handler.next_index()
    handler.reseat(1)
    assert "seat it again" in operator.prompts[-1] and not operator.answers
