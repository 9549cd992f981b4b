from core.label_names import SHOW_FLOOR, name_key, near_duplicates, shown_suggestion


def test_same_name_up_to_case_spacing_and_punctuation():
    assert near_duplicates("Washer", ["washer", "nut"]) == ["washer"]
    assert near_duplicates("hex-nut", ["hex nut", "nut"]) == ["hex nut"]
    assert near_duplicates("  HEX   NUT ", ["hex nut"]) == ["hex nut"]
    assert name_key("T-shirt/top") == "tshirttop"


def test_prefix_of_an_existing_label():
    assert near_duplicates("res", ["resistor", "washer"]) == ["resistor"]
    # same-name matches come before longer names
    assert near_duplicates("Nut", ["nut", "nutcase", "bolt"]) == ["nut", "nutcase"]


def test_no_question_for_an_exact_or_unrelated_label():
    assert near_duplicates("resistor", ["resistor", "res"]) == []
    assert near_duplicates("spring", ["resistor", "washer"]) == []
    assert near_duplicates("Shirt", ["T-shirt/top", "Sandal"]) == []   # Fashion-MNIST's class names
    assert near_duplicates("---", ["washer"]) == []                     # nothing to compare


def test_suggestions_shown():
    assert shown_suggestion("new area", "washer", 0.99) is None
    assert shown_suggestion("probable label", "washer", 0.03) is None
    assert shown_suggestion("probable label", "washer", SHOW_FLOOR) == "washer"
    assert shown_suggestion("split part", "washer", None) == "washer"
    assert shown_suggestion("probable label", None, 0.9) is None
