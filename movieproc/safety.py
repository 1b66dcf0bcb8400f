"""The caution every output of movieproc carries (the command's printout and the movie's attrs)."""

SAFETY = ("movieproc analyses recorded data. It does not set beam, laser or safety parameters; "
          "local rules and the facility's safety staff decide those.")
