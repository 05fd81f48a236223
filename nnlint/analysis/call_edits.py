"""Small libcst rewrites of calls that `nnlint fix` attaches to findings.

Each returns a new node built from the original's own pieces, so the whitespace and comments
around the arguments survive and only the edited argument's line changes.
"""
from __future__ import annotations

import libcst as cst


def with_keyword_appended(call: cst.Call, keyword: str, value: cst.BaseExpression) -> cst.Call:
    """`call` with `keyword=value` added after its last argument, on that argument's line.

    A trailing comma stays trailing (`f(x, p=1,)` gives `f(x, p=1, k=v,)`), and the
    whitespace or comment that followed the last argument follows the new one.
    """
    last = call.args[-1]
    comma = last.comma
    separator = cst.Comma(
        whitespace_before=comma.whitespace_before if isinstance(comma, cst.Comma)
        else cst.SimpleWhitespace(""),
        whitespace_after=cst.SimpleWhitespace(" "))
    added = cst.Arg(value=value, keyword=cst.Name(keyword),
                    equal=cst.AssignEqual(whitespace_before=cst.SimpleWhitespace(""),
                                          whitespace_after=cst.SimpleWhitespace("")),
                    comma=comma, whitespace_after_arg=last.whitespace_after_arg)
    moved = last.with_changes(comma=separator, whitespace_after_arg=cst.SimpleWhitespace(""))
    return call.with_changes(args=(*call.args[:-1], moved, added))


def attribute_of(name: str, attribute: str) -> cst.Attribute:
    """`name.attribute` as a node (`self.training`)."""
    return cst.Attribute(value=cst.Name(name), attr=cst.Name(attribute))


def with_method_call(expr: cst.BaseExpression, method: str) -> cst.Call:
    """`expr.method()`, parenthesising `expr` when the attribute would bind tighter."""
    if not isinstance(expr, (cst.Name, cst.Attribute, cst.Call, cst.Subscript)) and \
            not expr.lpar:
        expr = expr.with_changes(lpar=(cst.LeftParen(),), rpar=(cst.RightParen(),))
    return cst.Call(func=cst.Attribute(value=expr, attr=cst.Name(method)))
