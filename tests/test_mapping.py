"""Mapping raw event names to states: renames, regex and path rules, drops, errors.

Raw names come from an invented shop ("Brambleby Home") and an invented job runner.
Sections of published specs (RFCs, jsonlines.org, YAML) named in comments are cited
from memory; no copy of them is kept in this repository.
"""

from __future__ import annotations

import pytest
import yaml

from tracechain.errors import ConfigError
from tracechain.shape.mapping import load_mapping, parse_mapping


@pytest.fixture
def shop_mapping():
    return parse_mapping(
        """\
version: 1
rename:
  home_view: Home
  basket: Cart
rules:
  - regex: '^search:(\\w+)$'
    state: 'Search {1}'
  - regex: '^cat:(?P<dept>\\w+):(\\d+)$'
    state: 'Dept {dept} page {2}'
  - path: /item/{id}
    state: 'Item {id}'
  - path: /files/{rest*}
    state: 'Files {rest}'
  - regex: '^debug\\.'
    drop: true
"""
    )


# --- renames ---------------------------------------------------------------------


def test_rename_is_exact(shop_mapping):
    assert shop_mapping.map("home_view") == "Home"
    assert shop_mapping.map("basket") == "Cart"
    # exact only: no prefix, suffix or case folding
    assert shop_mapping.map("home_view2") == "home_view2"
    assert shop_mapping.map("Home_view") == "Home_view"
    assert shop_mapping.map("basket ") == "basket "


def test_rename_is_tried_before_the_rules():
    m = parse_mapping("rename:\n  search:lamps: Lamp search\nrules:\n  - regex: '^search:'\n    state: Search\n")
    assert m.map("search:lamps") == "Lamp search"
    assert m.map("search:rugs") == "Search"


# --- regex rules -----------------------------------------------------------------


def test_regex_numbered_capture_in_state(shop_mapping):
    assert shop_mapping.map("search:lamps") == "Search lamps"
    assert shop_mapping.map("search:rugs") == "Search rugs"


def test_regex_named_and_numbered_captures_in_state(shop_mapping):
    # the named group is also group 1, the plain one group 2 (Python re numbering)
    assert shop_mapping.map("cat:kitchen:3") == "Dept kitchen page 3"


def test_regex_that_does_not_match_leaves_the_name(shop_mapping):
    assert shop_mapping.map("search:two words") == "search:two words"  # \w+ then $: no match
    assert shop_mapping.map("cat:kitchen:x") == "cat:kitchen:x"


def test_regex_search_is_unanchored_unless_the_pattern_anchors():
    m = parse_mapping("rules:\n  - regex: 'pay'\n    state: Payment\n")
    assert m.map("checkout/pay/card") == "Payment"
    assert m.map("PAY") == "PAY"  # case matters


# --- path templates --------------------------------------------------------------


@pytest.mark.parametrize(
    "raw",
    [
        "/item/42",
        "/item/42/",  # one trailing slash is ignored
        "/item/42?ref=x",  # RFC 3986 section 3.4: the query is not part of the path
        "/item/42#reviews",  # RFC 3986 section 3.5: neither is the fragment
        "https://shop.example/item/42",  # RFC 3986 section 3: scheme and authority come before the path
        "https://shop.example:8443/item/42?ref=mail",
    ],
)
def test_path_template_matches_the_path_of_a_url(shop_mapping, raw):
    assert shop_mapping.map(raw) == "Item 42"


@pytest.mark.parametrize("raw", ["/item/42/reviews", "/item/", "/item", "/items/42", "item/42", "/shop/item/42"])
def test_path_template_does_not_match_other_paths(shop_mapping, raw):
    assert shop_mapping.map(raw) == raw  # unmatched names are kept (the default)


def test_path_template_star_takes_the_rest_of_the_path(shop_mapping):
    assert shop_mapping.map("/files/a") == "Files a"
    assert shop_mapping.map("/files/a/b/c") == "Files a/b/c"
    assert shop_mapping.map("/files/a/b/c?x=1") == "Files a/b/c"
    # the one ignorable trailing slash is not part of the captured rest
    assert shop_mapping.map("/files/a/b/") == "Files a/b"
    assert shop_mapping.map("/files/") == "/files/"  # the rest is not empty


def test_path_template_with_trailing_slash_ignores_it_too():
    m = parse_mapping("rules:\n  - path: /help/\n    state: Help\n")
    assert m.map("/help") == "Help"
    assert m.map("/help/") == "Help"
    assert m.map("/help/returns") == "/help/returns"


def test_path_template_for_the_root():
    m = parse_mapping("rules:\n  - path: /\n    state: Home\n")
    assert m.map("/") == "Home"
    assert m.map("https://shop.example") == "Home"  # an empty path is the root (RFC 3986 section 6.2.3)
    assert m.map("/?utm=mail") == "Home"
    assert m.map("/lamps") == "/lamps"


def test_path_template_literal_parts_are_not_regex():
    m = parse_mapping("rules:\n  - path: /v1.2/{job}\n    state: 'Job {job}'\n")
    assert m.map("/v1.2/build") == "Job build"
    assert m.map("/v1x2/build") == "/v1x2/build"


# --- drops and unmatched ---------------------------------------------------------


def test_drop_rule_returns_none(shop_mapping):
    assert shop_mapping.map("debug.render") is None
    assert shop_mapping.map("nodebug.render") == "nodebug.render"


def test_unmatched_keep_is_the_default(shop_mapping):
    assert shop_mapping.unmatched == "keep"
    assert shop_mapping.map("newsletter") == "newsletter"


def test_unmatched_drop():
    m = parse_mapping("rename:\n  home_view: Home\nunmatched: drop\n")
    assert m.map("home_view") == "Home"
    assert m.map("newsletter") is None


def test_unmatched_lumped_into_a_named_state():
    m = parse_mapping("rename:\n  home_view: Home\nunmatched: Other\n")
    assert m.map("home_view") == "Home"
    assert m.map("newsletter") == "Other"
    assert m.map("/item/7") == "Other"


def test_first_matching_rule_wins():
    m = parse_mapping(
        """\
rules:
  - regex: '^job:deploy'
    state: Deploy
  - regex: '^job:'
    state: Other job
  - regex: '^job:deploy:prod'
    state: never reached
"""
    )
    assert m.map("job:deploy:prod") == "Deploy"
    assert m.map("job:test") == "Other job"


def test_a_drop_rule_before_a_state_rule_wins():
    m = parse_mapping("rules:\n  - regex: '^job:noop'\n    drop: true\n  - regex: '^job:'\n    state: Job\n")
    assert m.map("job:noop") is None
    assert m.map("job:run") == "Job"


def test_other_settings_are_read():
    m = parse_mapping(
        "collapse_repeats: true\ngoals: [Order placed]\nterminal: Closed\ngroups:\n  Home: browse\n"
    )
    assert m.collapse_repeats is True
    assert m.goals == ("Order placed",)
    assert m.terminal == ("Closed",)
    assert m.groups == {"Home": "browse"}


def test_empty_file_is_an_empty_mapping():
    m = parse_mapping("")
    assert m.map("anything") == "anything"
    assert m.rules == ()


def test_load_mapping_reads_a_file_and_names_it_in_errors(tmp_path):
    good = tmp_path / "runner.yaml"
    good.write_text("rename:\n  q: Queued\n", encoding="utf-8")
    assert load_mapping(str(good)).map("q") == "Queued"
    bad = tmp_path / "broken.yaml"
    bad.write_text("rename:\n  q: Queued\nfunnel: 3\n", encoding="utf-8")
    with pytest.raises(ConfigError) as info:
        load_mapping(str(bad))
    assert str(bad) in str(info.value)
    assert info.value.line == 3


def test_load_mapping_missing_file_is_a_config_error(tmp_path):
    with pytest.raises(ConfigError):
        load_mapping(str(tmp_path / "nowhere.yaml"))


# --- errors carry the line -------------------------------------------------------


def _error(text: str) -> ConfigError:
    with pytest.raises(ConfigError) as info:
        parse_mapping(text, "runner.yaml")
    return info.value


def test_malformed_yaml_names_the_line():
    err = _error("rename:\n  a: A\n b: B\n")  # line 3 is indented wrongly
    assert err.line == 3
    assert "runner.yaml:3:" in str(err)


def test_unclosed_flow_sequence_names_a_line():
    err = _error("rules:\n  - regex: a\n    state: [unclosed\n")
    assert err.line is not None and err.line >= 3
    assert "not valid YAML" in str(err)


def test_unknown_top_level_key_names_its_line():
    err = _error("version: 1\nrename: {}\nfunnel: 3\n")
    assert err.line == 3
    assert "'funnel'" in str(err)


def test_unknown_rule_key_names_the_rule_line():
    err = _error("rules:\n  - regex: a\n    state: A\n  - regex: b\n    stat: B\n")
    assert err.line == 4
    assert "stat" in str(err)


def test_rule_with_both_state_and_drop_names_its_line():
    err = _error("rules:\n  - regex: a\n    state: A\n  - regex: b\n    state: B\n    drop: true\n")
    assert err.line == 4
    assert "state" in str(err) and "drop" in str(err)


def test_rule_with_neither_state_nor_drop_names_its_line():
    err = _error("rules:\n  - regex: a\n    state: A\n\n  - regex: b\n")
    assert err.line == 5


def test_invalid_regex_names_the_rule_line():
    err = _error("rules:\n  - regex: a\n    state: A\n  - regex: '(unclosed'\n    state: B\n")
    assert err.line == 4
    assert "(unclosed" in str(err)


def test_invalid_path_template_names_the_rule_line():
    err = _error("rules:\n  - path: /a/{x}/{x}\n    state: A\n")  # the same placeholder twice
    assert err.line == 2


def test_rule_with_both_regex_and_path_names_its_line():
    err = _error("rules:\n  - regex: a\n    path: /a\n    state: A\n")
    assert err.line == 2


def test_rule_that_is_not_a_mapping_names_its_line():
    err = _error("rules:\n  - regex: a\n    state: A\n  - just words\n")
    assert err.line == 4


def test_rules_that_are_not_a_list_name_the_key_line():
    err = _error("rename:\n  a: A\nrules: 5\n")
    assert err.line == 3


def test_duplicate_key_is_refused_with_its_line():
    # YAML 1.2 section 3.2.1.1: the keys of a mapping are unique
    err = _error("rename:\n  a: A\n  b: B\n  a: C\n")
    assert err.line == 4
    assert "'a'" in str(err)


def test_collapse_repeats_must_be_a_boolean():
    # a quoted 'false' is a string, which would otherwise read as true
    err = _error("collapse_repeats: 'false'\n")
    assert err.line == 1


def test_unsupported_version_is_refused():
    err = _error("version: 2\n")
    assert "version" in str(err)


def test_top_level_list_is_refused():
    err = _error("- regex: a\n  state: A\n")
    assert err.line == 1


@pytest.mark.parametrize(
    "text",
    [
        "rules: !!python/object/apply:os.system ['echo unsafe']\n",
        "rename:\n  a: !!python/object:collections.OrderedDict {}\n",
        "rename: !!python/name:os.getcwd\n",
    ],
    ids=["apply", "object", "name"],
)
def test_python_tags_are_refused(text):
    # PyYAML's safe loader builds only plain YAML types (PyYAML documentation, from memory)
    err = _error(text)
    assert "not valid YAML" in str(err)
    assert err.line is not None


def test_rename_keys_are_names_not_yaml_booleans_or_numbers():
    # YAML 1.1 (the dialect PyYAML reads, from memory) turns plain no/on into booleans and
    # 404 into a number; raw event names must stay as written.
    m = parse_mapping("rename:\n  no: Declined\n  on: Enabled\n  404: Not found\n  1.0: Version one\n")
    assert m.map("no") == "Declined"
    assert m.map("on") == "Enabled"
    assert m.map("404") == "Not found"
    assert m.map("1.0") == "Version one"
    assert m.map("False") == "False"  # not renamed


def test_boolean_settings_still_read_as_booleans():
    m = parse_mapping("collapse_repeats: true\nrules:\n  - regex: '^x$'\n    drop: true\n")
    assert m.collapse_repeats is True
    assert m.map("x") is None



# --- names are the text written, options keep their YAML types ------------------
#
# YAML 1.1 resolves plain (unquoted) scalars by their shape: no/yes/on/off in any of the
# listed capitalisations are booleans (YAML 1.1 type repository, yaml.org/type/bool.html),
# 0123 is an octal integer, 1_000 and 0x1F integers and 1:30 a base-60 integer
# (yaml.org/type/int.html), 1.0 and .inf floats (yaml.org/type/float.html), null and ~ the
# null value (yaml.org/type/null.html) and 2024-01-01 a date (yaml.org/type/timestamp.html);
# all cited from memory. PyYAML's safe loader implements that, and it is the oracle below that
# these really are typed. 1e3 stays text in YAML 1.1 (its floats need a '.') but is a float in
# YAML 1.2's core schema; 2024-13-45 is shaped like a date and PyYAML fails building it.
TYPED = ["no", "yes", "on", "off", "Yes", "OFF", "1.0", "0123", "1_000", "0x1F", "1:30", ".inf",
         "2024-01-01", "null", "~"]
NAMES = [t for t in TYPED if t not in ("null", "~")] + ["1e3", "2024-13-45"]


@pytest.mark.parametrize("text", TYPED)
def test_yaml_1_1_types_these_plain_scalars(text):
    assert not isinstance(yaml.safe_load(f"k: {text}\n")["k"], str)


def test_pyyaml_fails_on_a_date_shaped_plain_scalar_that_is_no_date():
    with pytest.raises(ValueError):
        yaml.safe_load("k: 2024-13-45\n")


@pytest.mark.parametrize("event", TYPED + ["1e3", "2024-13-45"])
def test_event_names_are_the_text_written(event):
    m = parse_mapping(f"rename:\n  {event}: Renamed\n  other: Other\n")
    assert m.rename == {event: "Renamed", "other": "Other"}
    assert m.map(event) == "Renamed"


@pytest.mark.parametrize("name", NAMES)
def test_state_names_are_the_text_written_everywhere_one_is_read(name):
    m = parse_mapping(
        f"""\
rename:
  raw: {name}
rules:
  - regex: '^r:'
    state: {name}
  - path: /p/{{id}}
    state: {name}
unmatched: {name}
goals: [{name}]
terminal:
  - {name}
groups:
  {name}: {name}
"""
    )
    assert m.rename == {"raw": name}
    assert [m.map("raw"), m.map("r:1"), m.map("/p/7"), m.map("unlisted")] == [name] * 4
    assert m.goals == (name,) and m.terminal == (name,)
    assert m.groups == {name: name}
    for value in (*m.rename.values(), *m.goals, *m.terminal, *m.groups, *m.groups.values(), m.unmatched):
        assert type(value) is str


@pytest.mark.parametrize("name", NAMES)
def test_regex_and_path_text_are_the_text_written(name):
    m = parse_mapping(f"rules:\n  - regex: {name}\n    state: Regex\n  - path: {name}\n    state: Path\n")
    assert m.rules[0].pattern.pattern == name
    assert m.map(name) == "Regex"  # 0123 is not 83, 1:30 not 90
    assert parse_mapping(f"rules:\n  - path: {name}\n    state: Path\n").map(name) == "Path"


def test_parser_section_values_are_the_text_written():
    m = parse_mapping("parser:\n  pattern: '^(?P<session>\\S+) (?P<event>\\S+)'\n  time_unit: 1.0\n")
    assert m.parser["time_unit"] == "1.0"


def test_quoted_null_is_the_state_null():
    m = parse_mapping("rename:\n  a: 'null'\n  b: '~'\ngoals: ['null']\n")
    assert m.map("a") == "null" and m.map("b") == "~"
    assert m.goals == ("null",)


@pytest.mark.parametrize(
    "text, line",
    [
        ("rename:\n  a: A\n  checkout: null\n", 3),
        ("rename:\n  checkout: ~\n", 2),
        ("rename:\n  a: A\n  checkout:\ngoals: [A]\n", 3),  # nothing after the colon
        ("rules:\n  - regex: a\n    state: A\n  - regex: b\n    state: ~\n", 5),
        ("rules:\n  - regex: null\n    state: A\n", 2),
        ("goals: [Paid, null]\n", 1),
        ("terminal:\n  - Closed\n  - ~\n", 3),
        ("unmatched: null\n", 1),
        ("groups:\n  Home: browse\n  Cart: ~\n", 3),
    ],
)
def test_null_where_a_name_is_needed_is_an_error_with_file_and_line(text, line):
    err = _error(text)
    assert err.line == line
    assert str(err).startswith(f"runner.yaml:{line}: ")
    assert "null" in str(err)


def test_a_list_where_a_state_is_needed_is_an_error_with_its_line():
    err = _error("rename:\n  a: A\n  b: [B, C]\n")
    assert err.line == 3 and "must be text, not a list" in str(err)


def test_empty_top_level_lists_are_not_given():
    m = parse_mapping("rename:\ngoals:\nterminal: ~\ngroups: null\nrules:\n")
    assert (m.rename, m.goals, m.terminal, m.groups, m.rules) == ({}, (), (), {}, ())


def test_options_keep_their_yaml_types():
    # yes/no are YAML 1.1 booleans (yaml.org/type/bool.html, from memory) where an option is one
    m = parse_mapping("version: 1\ncollapse_repeats: yes\nrules:\n  - regex: '^x$'\n    drop: on\n")
    assert m.collapse_repeats is True
    assert m.map("x") is None
    assert parse_mapping("collapse_repeats: no\n").collapse_repeats is False
    assert "version 2" in str(_error("version: 2\n"))
