"""Test configuration: the suite runs in float64, as the README tells users to; the
command line's persistent compilation cache goes to a temporary folder, not the user's."""

import os

import jax
import pytest

jax.config.update("jax_enable_x64", True)


@pytest.fixture(autouse=True, scope="session")
def _compile_cache_in_a_temporary_folder(tmp_path_factory):
    # `fisherwalk demo/run` turn on JAX's cache in $XDG_CACHE_HOME/fisherwalk/jax
    before = os.environ.get("XDG_CACHE_HOME")
    os.environ["XDG_CACHE_HOME"] = str(tmp_path_factory.mktemp("xdg-cache"))
    yield
    if before is None:
        os.environ.pop("XDG_CACHE_HOME", None)
    else:
        os.environ["XDG_CACHE_HOME"] = before


@pytest.fixture
def interrupt_sampling(monkeypatch):
    """``interrupt_sampling(n)``: walk()'s chunk loop raises KeyboardInterrupt (a Ctrl-C)
    when it is about to hand over chunk ``n`` (0-based), for every sampler family;
    ``interrupt_sampling(None)`` undoes it."""
    from fisherwalk.workflow import sampling

    real = sampling._sample

    def interrupt(after):
        if after is None:
            monkeypatch.setattr(sampling, "_sample", real)
            return

        def patched(walker, key, state, collector, store, chunks, *rest, **options):
            def stopping(*args, **kwargs):
                for index, item in enumerate(chunks(*args, **kwargs)):
                    if index == after:
                        raise KeyboardInterrupt
                    yield item

            return real(walker, key, state, collector, store, stopping, *rest, **options)

        monkeypatch.setattr(sampling, "_sample", patched)

    return interrupt
