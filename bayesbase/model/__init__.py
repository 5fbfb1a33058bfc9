"""The model's numerics (numpy/scipy only): the exact engine (:mod:`.engine`, conjugate normal
update with quadrature over an uncertain CVI) and the drift model (:mod:`.trend`)."""
