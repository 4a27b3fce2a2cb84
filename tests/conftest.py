"""Test-session settings.

Under CI (the CI environment variable set), hypothesis runs derandomized: the same examples every
run, so a red build always means a change in the code, never a lucky draw. Locally it explores new
examples each run; any counterexample it finds is a bug to fix and then keep as an explicit example.
"""
import os

from hypothesis import settings

settings.register_profile("ci", derandomize=True, print_blob=True)
if os.environ.get("CI"):
    settings.load_profile("ci")
