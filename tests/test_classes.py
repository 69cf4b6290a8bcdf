"""The positive and negative class of a binary model, as every part of the service reads them
(the API's defaults: a binary model's positive class is the one named, else the last)."""

from belated.classes import negative_class, positive_class


def test_the_named_class_is_positive_and_the_other_negative() -> None:
    assert positive_class("kept", ["returned", "kept"]) == "kept"
    assert negative_class("kept", ["returned", "kept"]) == "returned"
    assert positive_class("returned", ["returned", "kept"]) == "returned"
    assert negative_class("returned", ["returned", "kept"]) == "kept"


def test_without_a_name_the_last_class_is_positive() -> None:
    assert positive_class(None, ["0", "1"]) == "1"
    assert negative_class(None, ["0", "1"]) == "0"
    assert negative_class(None, ["1"]) == ""
