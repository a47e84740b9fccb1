"""Inverse design of electron-coupled nanophotonic samples: what a designer works with.

From Python, use ``designer.api`` (the functions behind the ``velomatch`` commands)::

    from designer import api as vm
    result = vm.evaluate(vm.load_spec("sample.toml"))
"""
