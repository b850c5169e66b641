# Reference vectors of OpenCV's Rodrigues (cv2.Rodrigues) for the tests of
# package rotation. Run from this folder with Debian's python3 and the
# python3-opencv and python3-numpy packages:
#
#   python3 gen_rodrigues.py > rodrigues.json
#
# Every "vector" case maps a rotation vector (axis·angle, radians) to its
# matrix; every "matrix" case maps a rotation matrix (made from a random
# unit quaternion, independent of OpenCV) to OpenCV's rotation vector.
import json
import cv2
import numpy as np

rng = np.random.default_rng(20261201)

def unit(v):
    return v / np.linalg.norm(v)

vecs = []
# Random axes at angles spread over (0, π), plus the hard cases: zero,
# tiny angles (Taylor branch), near π and exactly π about the axes.
for a in list(rng.uniform(0, np.pi, 24)):
    vecs.append(unit(rng.normal(size=3)) * a)
for a in [0.0, 1e-12, 1e-8, 1e-5, 1e-3, np.pi - 1e-3, np.pi - 1e-6, np.pi]:
    vecs.append(unit(rng.normal(size=3)) * a)
for ax in np.eye(3):
    vecs.append(ax * np.pi)
    vecs.append(ax * 0.5)
# Angles beyond π (OpenCV accepts any vector) and negative directions.
for a in [4.0, 6.0, 2 * np.pi - 1e-3, 9.0]:
    vecs.append(unit(rng.normal(size=3)) * a)

cases_v = []
for v in vecs:
    R, J = cv2.Rodrigues(np.asarray(v, dtype=np.float64).reshape(3, 1))
    cases_v.append({"rvec": [float(x) for x in v], "matrix": [[float(x) for x in row] for row in R]})

def quat_to_matrix(q):
    w, x, y, z = q
    return np.array([
        [1 - 2 * (y * y + z * z), 2 * (x * y - w * z), 2 * (x * z + w * y)],
        [2 * (x * y + w * z), 1 - 2 * (x * x + z * z), 2 * (y * z - w * x)],
        [2 * (x * z - w * y), 2 * (y * z + w * x), 1 - 2 * (x * x + y * y)],
    ])

cases_m = []
for i in range(24):
    q = unit(rng.normal(size=4))
    if q[0] < 0:
        q = -q
    R = quat_to_matrix(q)
    r, J = cv2.Rodrigues(R)
    cases_m.append({"matrix": [[float(x) for x in row] for row in R], "rvec": [float(x) for x in r.ravel()]})
# Near-identity and near-π matrices through the quaternion (w small: angle near π).
for w in [1.0, 1 - 1e-10, 1e-4, 1e-7]:
    v = unit(rng.normal(size=3)) * np.sqrt(1 - w * w)
    q = np.array([w, *v])
    R = quat_to_matrix(q)
    r, J = cv2.Rodrigues(R)
    cases_m.append({"matrix": [[float(x) for x in row] for row in R], "rvec": [float(x) for x in r.ravel()]})

print(json.dumps({
    "generator": "cv2.Rodrigues, OpenCV " + cv2.__version__ + ", numpy " + np.__version__,
    "command": "python3 gen_rodrigues.py > rodrigues.json",
    "vector_to_matrix": cases_v,
    "matrix_to_vector": cases_m,
}, indent=1))
