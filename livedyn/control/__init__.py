"""Remote control of a live engine: MIDI (:mod:`.midi`), OSC (:mod:`.osc`), the one way in
they share (:mod:`.hub`), the parameter tapers they map through (:mod:`.taper`), and the
built-in test sources (:mod:`.sources`).

Layer: above the engine (it uses only the engine's control surface), below the console and
the command line."""
