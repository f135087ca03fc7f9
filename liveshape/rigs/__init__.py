"""Rigs: the things the controller drives and listens to.

``plant`` describes a drive/response chain physically (sound card, amplifier, Thiele–Small
shaker, payload, accelerometer) and ``sim`` turns that description into a block processor with
injectable faults; ``feasibility`` checks a profile against a plant's limits. ``audio`` (the one
sounddevice importer) and ``jackrig`` connect the same controller to real audio. Nothing is
imported here, so importing a pure rig module never pulls in an audio library.
"""
