"""Every URL pattern of the project, with its path converters filled from real objects.

Used by the blinding and role tests so that a new endpoint is covered the moment it is
added to a URL conf: the walk starts at `django.urls.get_resolver()` and recurses into
every include. A pattern whose parameters cannot be filled makes the tests fail with the
parameter's name, rather than being skipped.
"""

from __future__ import annotations

import itertools
import re
from collections.abc import Iterator, Mapping, Sequence
from dataclasses import dataclass

from django.urls import URLPattern, URLResolver, get_resolver, resolve
from django.urls.resolvers import RegexPattern, RoutePattern

_ROUTE_PARAM = re.compile(r"<(?:(?P<converter>[^>:]+):)?(?P<name>[^>]+)>")


@dataclass(frozen=True)
class Leaf:
    """One URL pattern: its full name (namespace:name, or the route when unnamed)."""

    name: str
    parts: tuple  # the chain of patterns from the root to this leaf
    callback: object

    @property
    def route(self) -> str:
        return "".join(str(part) for part in self.parts)


@dataclass(frozen=True)
class Url:
    leaf: Leaf
    path: str
    params: tuple[tuple[str, str], ...]


def leaves(resolver: URLResolver | None = None) -> list[Leaf]:
    """All URL patterns under the root URL conf, depth first."""
    found: list[Leaf] = []

    def walk(node: URLResolver, chain: tuple, namespaces: tuple[str, ...]) -> None:
        for entry in node.url_patterns:
            if isinstance(entry, URLResolver):
                ns = (*namespaces, entry.namespace) if entry.namespace else namespaces
                walk(entry, (*chain, entry.pattern), ns)
            elif isinstance(entry, URLPattern):
                parts = (*chain, entry.pattern)
                label = entry.name or "".join(str(p) for p in parts)
                found.append(Leaf(":".join((*namespaces, label)), parts, entry.callback))

    walk(resolver or get_resolver(), (), ())
    return found


def _regex_params(regex: str) -> list[tuple[str, int, int]]:
    """(name, start, end) of each named group in a regex, nested parentheses allowed."""
    groups = []
    for match in re.finditer(r"\(\?P<(?P<name>\w+)>", regex):
        depth, index = 1, match.end()
        while depth and index < len(regex):
            if regex[index] == "\\":
                index += 2
                continue
            depth += {"(": 1, ")": -1}.get(regex[index], 0)
            index += 1
        groups.append((match.group("name"), match.start(), index))
    return groups


def _segments(part) -> tuple[str, list[tuple[str, str]]]:
    """A pattern as a format string with {name} slots, and its (converter, name) params."""
    if isinstance(part, RoutePattern):
        route = str(part)
        params = [
            (m.group("converter") or "str", m.group("name")) for m in _ROUTE_PARAM.finditer(route)
        ]
        return _ROUTE_PARAM.sub(lambda m: "{" + m.group("name") + "}", route), params
    if isinstance(part, RegexPattern):
        regex = part._regex
        out, params, last = [], [], 0
        for name, start, end in _regex_params(regex):
            out.append(regex[last:start])
            out.append("{" + name + "}")
            params.append(("regex", name))
            last = end
        out.append(regex[last:])
        text = "".join(out).lstrip("^").rstrip("$").replace("\\", "")
        return text, params
    raise TypeError(f"unknown URL pattern type {type(part).__name__} in {part!r}")


def urls_for(leaf: Leaf, values: Mapping[tuple[str, str], Sequence[str]]) -> list[Url]:
    """Every URL of `leaf` with each combination of candidate values for its parameters.

    `values` maps (converter, name) to candidates; (converter, "*") is the fallback for
    a converter. Each URL is checked to resolve back to the leaf's own view.
    """
    template, params = "", []
    for part in leaf.parts:
        text, found = _segments(part)
        template += text
        params += found
    choices = []
    for converter, name in params:
        candidates = values.get((converter, name)) or values.get((converter, "*"))
        if not candidates:
            raise LookupError(
                f"no test value for parameter <{converter}:{name}> of {leaf.name} ({leaf.route})"
            )
        choices.append(candidates)
    urls = []
    for combo in itertools.product(*choices) if params else [()]:
        filled = dict(zip([name for _, name in params], combo, strict=True))
        path = "/" + template.format(**filled)
        match = resolve(path)
        if match.func is not leaf.callback:
            raise LookupError(f"{path} (built for {leaf.name}) resolves to {match.view_name}")
        urls.append(Url(leaf, path, tuple(filled.items())))
    return urls


def all_urls(values: Mapping[tuple[str, str], Sequence[str]]) -> Iterator[Url]:
    for leaf in leaves():
        yield from urls_for(leaf, values)
