"""What the CLI tests share."""


def one_line_error(res, *words):
    """Assert a CliRunner result is exit code 1 with one 'formread: error:' line holding ``words``."""
    assert res.exit_code == 1, res.output
    err = res.stderr.strip()
    assert err.startswith("formread: error:") and "\n" not in err, err
    for w in words:
        assert w in err, err
