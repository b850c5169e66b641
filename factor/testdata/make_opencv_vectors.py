#!/usr/bin/env python3
# Makes opencv_vectors.json, the reference vectors of the distortion model
# and the rotation-vector convention, with Debian 12's python3-opencv 4.6
# and python3-numpy. Regenerate from this directory with
#
#   /usr/bin/python3 make_opencv_vectors.py > opencv_vectors.json
#
# Intrinsics: the camera matrix and distortion of opencv-doc's
# left_intrinsics.yml (copied here as numbers so the vectors do not need
# the file). Points: a fixed grid of normalised points and random rvecs.
import json
import cv2
import numpy as np

K = np.array([[535.91573396163199, 0, 342.28315473308373],
              [0, 535.91573396163199, 235.57082909788173],
              [0, 0, 1]])
dist = np.array([-0.26637260909660682, -0.038588898922304653,
                 0.0017831947042852964, -0.00028122100441115472,
                 0.23839153080878486])
rng = np.random.default_rng(20261201)

# projectPoints: 3D points through rvec/tvec, K, dist.
pts3 = rng.uniform([-0.3, -0.2, 0.0], [0.3, 0.2, 0.1], size=(12, 3))
rvec = np.array([0.16866673097722978, 0.27567195383689680, 0.013463666677617407])
tvec = np.array([-0.075217911266918208, -0.10895943925991841, 0.39970206949907272])
proj, _ = cv2.projectPoints(pts3, rvec, tvec, K, dist)
proj0, _ = cv2.projectPoints(pts3, rvec, tvec, K, np.zeros(5))

# undistortPointsIter with a tight criterion (the default undistortPoints
# stops after 5 fixed-point iterations), output in pixels (P = K).
dpix = rng.uniform([20, 20], [620, 460], size=(20, 2))
crit = (cv2.TERM_CRITERIA_COUNT | cv2.TERM_CRITERIA_EPS, 1000, 1e-15)
und = cv2.undistortPointsIter(dpix.reshape(-1, 1, 2), K, dist, None, K, crit)

rvecs = rng.normal(size=(5, 3))
rots = [cv2.Rodrigues(r)[0].tolist() for r in rvecs]

out = {
    "source": "python3-opencv 4.6 (Debian 12): make_opencv_vectors.py",
    "K": K.tolist(), "dist": dist.tolist(),
    "project": {"rvec": rvec.tolist(), "tvec": tvec.tolist(),
                "points": pts3.tolist(),
                "pixels": proj.reshape(-1, 2).tolist(),
                "pixels_nodist": proj0.reshape(-1, 2).tolist()},
    "undistort": {"distorted": dpix.tolist(),
                  "undistorted": und.reshape(-1, 2).tolist()},
    "rodrigues": {"rvecs": rvecs.tolist(), "R": rots},
}
print(json.dumps(out, indent=1))
