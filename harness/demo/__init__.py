"""The demo scenario: an invented river gauge, its link, its report format and a capture."""
