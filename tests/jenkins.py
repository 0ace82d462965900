"""Test-only reference: a fine discretization of the Iwan slider density into Jenkins elements.

Independent of the closed-form joint: each Jenkins element (unit-stiffness spring in series with a
Coulomb slider of strength phi) is advanced as a stop operator, e <- clip(e + du, -phi, phi)
(M. A. Krasnosel'skii and A. V. Pokrovskii, Systems with Hysteresis, Springer 1989), and the
force is F = sum_k w_k e_k.  The density rho(phi) = R phi^chi on (0, phimax) plus a point mass S
at phimax (Segalman 2005) is cut into cells on a grid refined quadratically towards phi = 0, where
it is singular; each cell's weight is its exact integral of rho and its element sits at the
rho*phi-weighted centroid, so fully slipped and stuck cells both carry their exact force.
"""
import numpy as np


class JenkinsArray:
    def __init__(self, Fs, Kt, chi, beta, n=20000):
        a = (chi + 1.0) / (chi + 2.0)
        phimax = Fs * (1.0 + beta) / (Kt * (beta + a))
        R = Fs * (chi + 1.0) / (phimax ** (chi + 2.0) * (beta + a))
        S = beta * Kt / (1.0 + beta)
        edges = phimax * (np.arange(n + 1) / n) ** 2
        m0 = R * edges ** (chi + 1.0) / (chi + 1.0)   # int_0^phi rho
        m1 = R * edges ** (chi + 2.0) / (chi + 2.0)   # int_0^phi rho phi
        w = np.diff(m0)
        phi = np.diff(m1) / w
        self.w = np.append(w, S)
        self.phi = np.append(phi, phimax)
        self.e = np.zeros_like(self.phi)
        self.u = 0.0
        self.phimax = phimax

    def move(self, u):
        np.clip(self.e + (u - self.u), -self.phi, self.phi, out=self.e)
        self.u = u
        return float(self.w @ self.e)

    def stored(self):
        return float(0.5 * self.w @ (self.e ** 2))
