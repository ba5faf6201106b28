/* C reference E-steps over the same arrays as spark_align's kernels (benchmark only).
 *
 * Layout (see spark_align/kernels/ragged.py): a view of n_pairs pairs; pair p has
 * l = cond_len[p] cond words and m = gen_len[p] generated words; its cells are
 * (l+1) x (m+1) dictionary indices, row-major, starting at cell_offsets[p];
 * row 0 is the cond NULL, column 0 is ignored. t holds one probability per
 * dictionary entry; counts (zeroed by the caller) receives one value per entry.
 *
 * Compiled at benchmark time with the system C compiler at -O2, no other flags.
 */
#include <math.h>
#include <stdint.h>
#include <stdlib.h>
#include <string.h>

/* Model 1: post(i, j) = t(f_j | e_i) / sum_i' t(f_j | e_i'); loglik = sum_j log sum_i t - m log(l+1). */
double ibm1_estep(int64_t n_pairs, const int64_t *cond_len, const int64_t *gen_len,
                  const int64_t *cell_offsets, const int32_t *cells, const double *t, double *counts)
{
    double loglik = 0.0;
    for (int64_t p = 0; p < n_pairs; p++) {
        const int64_t l = cond_len[p], m = gen_len[p], w = m + 1;
        const int32_t *c = cells + cell_offsets[p];
        for (int64_t j = 1; j <= m; j++) {
            double denom = 0.0;
            for (int64_t i = 0; i <= l; i++) denom += t[c[i * w + j]];
            const double inv = 1.0 / denom;
            for (int64_t i = 0; i <= l; i++) counts[c[i * w + j]] += t[c[i * w + j]] * inv;
            loglik += log(denom);
        }
        loglik -= (double)m * log((double)(l + 1));
    }
    return loglik;
}

/* HMM with NULL states (spark_align/kernels/hmm.py): forward-backward per pair with
 * per-position scaling, lexical counts, jump counts N per bucket and M per (a, r) context.
 * jump: 2K+1 weights; stats: (2K+1) + (cap+1)^2, zeroed by the caller. */
double hmm_estep(int64_t n_pairs, const int64_t *cond_len, const int64_t *gen_len,
                 const int64_t *cell_offsets, const int32_t *cells, const double *t, double *counts,
                 const double *jump, double p0, int64_t max_jump, int64_t cap, double *stats)
{
    int64_t max_l = 0, max_m = 0;
    for (int64_t p = 0; p < n_pairs; p++) {
        if (cond_len[p] > max_l) max_l = cond_len[p];
        if (gen_len[p] > max_m) max_m = gen_len[p];
    }
    const int64_t nb = 2 * max_jump + 1;
    double *trans = malloc(sizeof(double) * (max_l * max_l + 1));
    double *ar = malloc(sizeof(double) * (max_l * max_m + 1));
    double *an = malloc(sizeof(double) * (max_l * max_m + 1));
    double *beta = malloc(sizeof(double) * (max_l * max_m + 1));
    double *scale = malloc(sizeof(double) * (max_m + 1));
    double *s = malloc(sizeof(double) * (max_l + 1));
    double *g = malloc(sizeof(double) * (max_l + 1));
    double *x = malloc(sizeof(double) * (max_l * max_l + 1));
    double loglik = 0.0;
    for (int64_t p = 0; p < n_pairs; p++) {
        const int64_t l = cond_len[p], m = gen_len[p], w = m + 1;
        const int32_t *c = cells + cell_offsets[p];
        if (m == 0) continue;
        if (l == 0) {
            for (int64_t j = 1; j <= m; j++) { counts[c[j]] += 1.0; loglik += log(t[c[j]]); }
            continue;
        }
        /* T = (1 - p0) A, A[i'][i] = c(d(i - i')) / sum_i'' c(d(i'' - i')). */
        for (int64_t a = 0; a < l; a++) {
            double z = 0.0;
            for (int64_t b = 0; b < l; b++) {
                int64_t d = b - a; d = d < -max_jump ? -max_jump : (d > max_jump ? max_jump : d);
                trans[a * l + b] = jump[d + max_jump]; z += trans[a * l + b];
            }
            for (int64_t b = 0; b < l; b++) trans[a * l + b] *= (1.0 - p0) / z;
        }
        /* forward */
        for (int64_t j = 0; j < m; j++) {
            const double en = t[c[j + 1]];
            double *arj = ar + j * l, *anj = an + j * l;
            if (j == 0) {
                for (int64_t i = 0; i < l; i++) {
                    arj[i] = t[c[(i + 1) * w + 1]] * ((1.0 - p0) / l);
                    anj[i] = en * (p0 / l);
                }
            } else {
                for (int64_t i = 0; i < l; i++) s[i] = ar[(j - 1) * l + i] + an[(j - 1) * l + i];
                for (int64_t i = 0; i < l; i++) arj[i] = 0.0;
                for (int64_t a = 0; a < l; a++) {
                    const double sa = s[a]; const double *tr = trans + a * l;
                    for (int64_t i = 0; i < l; i++) arj[i] += sa * tr[i];
                }
                for (int64_t i = 0; i < l; i++) {
                    arj[i] *= t[c[(i + 1) * w + j + 1]];
                    anj[i] = s[i] * p0 * en;
                }
            }
            double z = 0.0;
            for (int64_t i = 0; i < l; i++) z += arj[i] + anj[i];
            scale[j] = z;
            const double inv = 1.0 / z;
            for (int64_t i = 0; i < l; i++) { arj[i] *= inv; anj[i] *= inv; }
            loglik += log(z);
        }
        /* backward */
        for (int64_t i = 0; i < l; i++) beta[(m - 1) * l + i] = 1.0;
        for (int64_t j = m - 1; j > 0; j--) {
            const double en = t[c[j + 1]], inv = 1.0 / scale[j];
            const double *bj = beta + j * l; double *bp = beta + (j - 1) * l;
            for (int64_t i = 0; i < l; i++) g[i] = t[c[(i + 1) * w + j + 1]] * bj[i];
            for (int64_t a = 0; a < l; a++) {
                const double *tr = trans + a * l; double acc = 0.0;
                for (int64_t i = 0; i < l; i++) acc += tr[i] * g[i];
                bp[a] = (acc + p0 * en * bj[a]) * inv;
            }
        }
        /* lexical counts */
        for (int64_t j = 0; j < m; j++) {
            double null_post = 0.0;
            for (int64_t i = 0; i < l; i++) {
                counts[c[(i + 1) * w + j + 1]] += ar[j * l + i] * beta[j * l + i];
                null_post += an[j * l + i] * beta[j * l + i];
            }
            counts[c[j + 1]] += null_post;
        }
        /* jump counts xi(i', i) = s_{j-1}(i') T(i', i) e_j(i) beta_j(i) / scale_j */
        memset(x, 0, sizeof(double) * l * l);
        for (int64_t j = 1; j < m; j++) {
            const double inv = 1.0 / scale[j];
            for (int64_t i = 0; i < l; i++) {
                s[i] = ar[(j - 1) * l + i] + an[(j - 1) * l + i];
                g[i] = t[c[(i + 1) * w + j + 1]] * beta[j * l + i] * inv;
            }
            for (int64_t a = 0; a < l; a++) {
                const double sa = s[a]; const double *tr = trans + a * l; double *xa = x + a * l;
                for (int64_t i = 0; i < l; i++) xa[i] += sa * tr[i] * g[i];
            }
        }
        for (int64_t a = 0; a < l; a++) {
            double row = 0.0;
            for (int64_t b = 0; b < l; b++) {
                int64_t d = b - a; d = d < -max_jump ? -max_jump : (d > max_jump ? max_jump : d);
                stats[d + max_jump] += x[a * l + b]; row += x[a * l + b];
            }
            int64_t ra = a < cap ? a : cap, rr = (l - 1 - a) < cap ? (l - 1 - a) : cap;
            stats[nb + ra * (cap + 1) + rr] += row;
        }
    }
    free(trans); free(ar); free(an); free(beta); free(scale); free(s); free(g); free(x);
    return loglik;
}
