"""What a person sees: plain-text rows, a character plot and the live terminal dashboard.

:mod:`.textformat`, :mod:`.textplot`, :mod:`.runtext` and :mod:`.checktext` turn frozen results
into rows of text (pure); :mod:`.dashboard` is the one :mod:`rich` importer. Views read results;
nothing below them imports a view.
"""
