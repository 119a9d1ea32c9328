"""Stored results stay current across upgrades: the keys that enter stage fingerprints.

A stage's fingerprint hashes its config tables (corrpipe.pipeline). A key added to a table
changes every stored fingerprint unless it is declared ``setting(..., neutral_default=True)``
(its default gives exactly the old results), in which case it stays out of fingerprints while
it holds the default. This test lists the fingerprinted keys of every table as they stand; a
new key that fails it must either be marked neutral (no stored run is recomputed) or, if its
default really changes results, be added here deliberately (stored runs will recompute).
Common practice for resumable, content-addressed pipelines.
"""

from __future__ import annotations

import dataclasses

from corrpipe.config import section_classes

FINGERPRINTED_KEYS = {'catalogue': ['box_redshift', 'box_size', 'dec_column', 'format', 'kind', 'los_axis', 'name',
               'path', 'ra_column', 'redshift_column', 'table', 'weight_columns',
               'wrap_tolerance', 'x_column', 'y_column', 'z_column', 'z_max', 'z_min'],
 'cosmology': ['N_eff', 'T_cmb', 'h', 'n_s', 'omega_b', 'omega_k', 'omega_m', 'preset', 'r_d',
               'sigma8', 'w0', 'wa'],
 'counts': ['box_rr', 'line_of_sight', 'mu_range', 'n_mu', 'n_pi', 'n_rp', 'n_s', 'pi_max',
            'projected', 'raw_counts', 'rp_max', 'rp_min', 's_max', 's_min', 'spacing'],
 'covariance': ['beta', 'bias', 'cross_weight', 'cubes_per_side', 'jackknife_weighting',
                'k_max', 'kind', 'kmeans_sample', 'max_condition', 'mocks', 'n_regions',
                'pk_file', 'region_nside', 'regions'],
 'engine': ['account', 'cluster', 'connect_timeout', 'job_directives', 'job_prologue', 'kind',
            'memory_per_worker', 'n_workers', 'queue', 'scheduler', 'scheduler_file',
            'threads_per_worker', 'units_per_task', 'walltime', 'work_units',
            'worker_timeout'],
 'estimate': ['ells', 'estimator', 'mu_merge', 'multipole_method', 'pi_max', 's_merge',
              'wedges'],
 'expansion': ['H0_prior', 'N_eff', 'T_cmb', 'analyses', 'check_every', 'cross_covariance',
               'curvature', 'dpi', 'enabled', 'external', 'h_fixed', 'h_range', 'h_rd_range',
               'independent', 'likelihood', 'max_steps', 'mock_distances', 'model', 'n_walkers',
               'neutrino_mass', 'omega_b_prior', 'omega_b_range', 'omega_k_range',
               'omega_m_range', 'plots', 'r_d_prior', 'tau_factor', 'use_analyses', 'w0_range',
               'w_range', 'wa_range'],
 'fit': ['A_s', 'B_max', 'B_min', 'alpha_max', 'alpha_min', 'analysis', 'beta',
         'beta_prior_width', 'broadband_powers', 'check_every', 'damping_model', 'ells',
         'epsilon_max',
         'hankel_damping', 'log_B_prior_width', 'max_steps', 'n_mu', 'n_walkers',
         'normalisation', 'nowiggle_width', 'parametrisation', 'power_file', 'power_spectrum',
         'profile_points', 'recon_convention', 'reconstructed', 's_max', 's_min', 'seed',
         'sigma_par', 'sigma_perp', 'sigma_prior_width', 'sigma_s', 'smoothing_radius',
         'tau_factor', 'tau_tolerance'],
 'footprint': ['boxes', 'completeness_as_weight', 'completeness_threshold', 'data_min_count',
               'data_nside', 'healpix_column', 'healpix_file', 'kind', 'vetoes'],
 'randoms': ['coverage_nside', 'file', 'n_sets', 'outside_warn_fraction', 'redshifts', 'seed',
             'size_factor', 'smoothing'],
 'reconstruct': ['bias', 'box_size', 'cell_size', 'convention', 'density_threshold', 'enabled',
                 'growth_rate', 'max_iterations', 'n_mesh', 'padding', 'precision',
                 'random_ratio', 'scheme', 'smoothing', 'tolerance'],
 'report': ['dpi', 'plots'],
 'run': ['output', 'progress', 'seed', 'threads'],
 'weights': ['fkp', 'fkp_p0', 'nz_bin_width', 'nz_interpolation']}


def test_fingerprinted_keys_are_the_recorded_ones():
    for table, cls in section_classes().items():
        keys = sorted(f.name for f in dataclasses.fields(cls)
                      if not f.metadata.get("neutral_default"))
        expected = FINGERPRINTED_KEYS.get(table)
        assert expected is not None, f"new table [{table}]: record its keys here"
        added = sorted(set(keys) - set(expected))
        removed = sorted(set(expected) - set(keys))
        assert not added and not removed, (
            f"[{table}] fingerprinted keys changed: added {added}, removed {removed}; mark a "
            "new key neutral_default=True if its default reproduces stored results")
