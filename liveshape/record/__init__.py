"""What a run leaves behind: the run folder, its reader, the report and offline drive files.

The crash-safe writer (:mod:`.writer`), the folder layout and reader (:mod:`.runfolder`), float
WAV files streamed block by block (:mod:`.wavstream`), the plots (:mod:`.report`, the one
matplotlib importer) and offline drive files (:mod:`.drivefile`). Imports :mod:`liveshape.dsp`,
:mod:`liveshape.testdef` and :mod:`liveshape.control` (the frozen run records).
"""
