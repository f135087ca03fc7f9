"""What a test is: the test definition and the files it is read from.

The frozen :class:`~liveshape.testdef.spec.TestSpec` and its loader (:mod:`.spec`), target
profiles from breakpoints and CSV files (:mod:`.profilefile`), tolerance bands
(:mod:`.tolerance`), fault definitions (:mod:`.fault_spec`), command-line overrides
(:mod:`.overrides`), the chain's units (:mod:`.chain`) and the one YAML importer
(:mod:`.config`). Imports :mod:`liveshape.dsp` only.
"""
