"""Element stiffness matrices of square Q4 (plane stress) and cubic H8 elements.

Both are computed by full Gauss quadrature (2 points per axis) of B^T D B over the
isoparametric element; local node and dof order follow :mod:`topopt.grid`.
"""

from __future__ import annotations

import itertools

import numpy as np

from topopt.grid import LOCAL_NODES

_GAUSS = np.array([-1.0, 1.0]) / np.sqrt(3.0)


def elasticity_matrix(dim: int, *, youngs_modulus: float, poisson_ratio: float) -> np.ndarray:
    """Isotropic constitutive matrix: plane stress in 2D, full 3D otherwise.

    Strain order: (exx, eyy, gxy) in 2D, (exx, eyy, ezz, gyz, gxz, gxy) in 3D, with
    engineering shear strains.

    Examples
    --------
    >>> float(elasticity_matrix(2, youngs_modulus=1.0, poisson_ratio=0.0)[2, 2])
    0.5
    """
    E, nu = float(youngs_modulus), float(poisson_ratio)
    if not -1.0 < nu < 0.5:
        raise ValueError(f"poisson_ratio must lie in (-1, 0.5), got {nu!r}")
    if not E > 0:
        raise ValueError(f"youngs_modulus must be > 0, got {E!r}")
    if dim == 2:
        c = E / (1.0 - nu**2)
        return c * np.array([[1.0, nu, 0.0], [nu, 1.0, 0.0], [0.0, 0.0, (1.0 - nu) / 2.0]])
    lam = E * nu / ((1.0 + nu) * (1.0 - 2.0 * nu))
    mu = E / (2.0 * (1.0 + nu))
    D = np.zeros((6, 6))
    D[:3, :3] = lam
    D[np.arange(3), np.arange(3)] += 2.0 * mu
    D[np.arange(3, 6), np.arange(3, 6)] = mu
    return D


def _strain_displacement(dim: int, xi: np.ndarray, element_size: float) -> np.ndarray:
    """B matrix at reference point ``xi`` of a square/cubic element of edge ``element_size``."""
    signs = 2.0 * LOCAL_NODES[dim] - 1.0  # (n_nodes, dim), entries -1 / +1
    n_nodes = signs.shape[0]
    # dN/dxi_a = s_a * prod_{b != a} (1 + s_b xi_b) / 2**dim; the Jacobian is h/2 * I.
    dN = np.empty((dim, n_nodes))
    for a in range(dim):
        factor = np.ones(n_nodes)
        for b in range(dim):
            if b != a:
                factor *= 1.0 + signs[:, b] * xi[b]
        dN[a] = signs[:, a] * factor / 2.0**dim
    dN *= 2.0 / element_size
    if dim == 2:
        B = np.zeros((3, 2 * n_nodes))
        B[0, 0::2] = dN[0]
        B[1, 1::2] = dN[1]
        B[2, 0::2] = dN[1]
        B[2, 1::2] = dN[0]
        return B
    B = np.zeros((6, 3 * n_nodes))
    B[0, 0::3] = dN[0]
    B[1, 1::3] = dN[1]
    B[2, 2::3] = dN[2]
    B[3, 1::3] = dN[2]
    B[3, 2::3] = dN[1]
    B[4, 0::3] = dN[2]
    B[4, 2::3] = dN[0]
    B[5, 0::3] = dN[1]
    B[5, 1::3] = dN[0]
    return B


def element_stiffness(
    dim: int,
    *,
    youngs_modulus: float,
    poisson_ratio: float,
    element_size: float,
    thickness: float = 1.0,
) -> np.ndarray:
    """Stiffness matrix of one Q4 (``dim=2``, plane stress) or H8 (``dim=3``) element.

    Parameters
    ----------
    dim : int
        2 or 3.
    youngs_modulus, poisson_ratio : float
        Isotropic material.
    element_size : float
        Edge length of the square / cube.
    thickness : float
        Out-of-plane thickness (2D only).

    Returns
    -------
    ndarray, shape (8, 8) or (24, 24)

    Examples
    --------
    >>> K = element_stiffness(2, youngs_modulus=1.0, poisson_ratio=0.3, element_size=1.0)
    >>> K.shape, bool(np.allclose(K, K.T))
    ((8, 8), True)
    """
    if dim not in (2, 3):
        raise ValueError(f"dim must be 2 or 3, got {dim!r}")
    if not element_size > 0:
        raise ValueError(f"element_size must be > 0, got {element_size!r}")
    D = elasticity_matrix(dim, youngs_modulus=youngs_modulus, poisson_ratio=poisson_ratio)
    det_j = (element_size / 2.0) ** dim
    n = dim * 2**dim
    K = np.zeros((n, n))
    for point in itertools.product(_GAUSS, repeat=dim):
        B = _strain_displacement(dim, np.array(point), element_size)
        K += B.T @ D @ B * det_j
    if dim == 2:
        K *= thickness
    return 0.5 * (K + K.T)


def q4_stiffness(
    *, youngs_modulus: float, poisson_ratio: float, element_size: float, thickness: float = 1.0
) -> np.ndarray:
    """Plane-stress Q4 element stiffness (8 x 8); see :func:`element_stiffness`."""
    return element_stiffness(
        2,
        youngs_modulus=youngs_modulus,
        poisson_ratio=poisson_ratio,
        element_size=element_size,
        thickness=thickness,
    )


def h8_stiffness(*, youngs_modulus: float, poisson_ratio: float, element_size: float) -> np.ndarray:
    """Trilinear H8 element stiffness (24 x 24); see :func:`element_stiffness`."""
    return element_stiffness(
        3, youngs_modulus=youngs_modulus, poisson_ratio=poisson_ratio, element_size=element_size
    )
