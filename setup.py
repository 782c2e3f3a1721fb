"""Map the top-level folders daemon/, drivers/, simulators/ into the ``shotpair`` namespace.

An explicit ``packages = [...]`` list in pyproject.toml silently drops nested subpackages from the wheel,
so the list is computed here from the tree instead.
"""

from setuptools import find_packages, setup

TOP_LEVEL = ("daemon", "drivers", "simulators")

packages: list[str] = []
package_dir: dict[str, str] = {}
for top in TOP_LEVEL:
    for found in find_packages(include=[top, top + ".*"]):
        name = "shotpair." + found
        packages.append(name)
        package_dir[name] = found.replace(".", "/")

setup(packages=packages, package_dir=package_dir)
