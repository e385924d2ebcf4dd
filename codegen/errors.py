"""Errors that carry the field, the value and the rule that was broken."""


class InputError(ValueError):
    """Bad user input: a vehicle file, a state, an option.

    The message always names the field, the offending value and the rule,
    so that the engineer can fix the file without reading our code.
    """

    def __init__(self, field: str, value, rule: str, hint: str = ""):
        self.field = field
        self.value = value
        self.rule = rule
        msg = f"{field} = {value!r}: {rule}"
        if hint:
            msg += f" ({hint})"
        super().__init__(msg)
