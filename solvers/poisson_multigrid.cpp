#include "poisson_multigrid.h"

#include <algorithm>
#include <functional>
#include <numeric>
#include <vector>

#include <Eigen/IterativeLinearSolvers>
#include <Eigen/SparseCholesky>
#include <opencv2/imgproc.hpp>

#include "lumenrig/capture_io/parallel.h"

namespace lumenrig::solvers::internal {
class PoissonOperator;
}  // namespace lumenrig::solvers::internal

// Eigen's matrix-free interface (Eigen documentation, "Matrix-free solvers"):
// the operator looks like a sparse matrix to ConjugateGradient.
namespace Eigen::internal {
template <>
struct traits<lumenrig::solvers::internal::PoissonOperator> : public traits<Eigen::SparseMatrix<double>> {};
}  // namespace Eigen::internal

namespace lumenrig::solvers::internal {

/// A = graph Laplacian of the 4-neighbour edges between the pixels of an
/// index map, plus 1e-9 on the diagonal, applied without assembling it:
/// (A x)_i = -x_above - x_left + (degree_i + 1e-9) x_i - x_right - x_below,
/// summed in that order (the column order of the assembled matrix, so the
/// products are those of Eigen's sparse product). Rows of the image are
/// independent, so they run in fixed chunks on `threads`.
class PoissonOperator : public Eigen::EigenBase<PoissonOperator> {
 public:
  using Scalar = double;
  using RealScalar = double;
  using StorageIndex = int;
  enum { ColsAtCompileTime = Eigen::Dynamic, MaxColsAtCompileTime = Eigen::Dynamic, IsRowMajor = false };

  PoissonOperator(const cv::Mat* index, Eigen::Index n, int threads) : index_(index), n_(n), threads_(threads) {}
  Eigen::Index rows() const { return n_; }
  Eigen::Index cols() const { return n_; }
  template <typename Rhs>
  Eigen::Product<PoissonOperator, Rhs, Eigen::AliasFreeProduct> operator*(const Eigen::MatrixBase<Rhs>& x) const {
    return Eigen::Product<PoissonOperator, Rhs, Eigen::AliasFreeProduct>(*this, x.derived());
  }

  /// dst += alpha * A x.
  void AddProduct(const double* x, double alpha, double* dst) const {
    const cv::Mat& index = *index_;
    const int h = index.rows, w = index.cols;
    io::ParallelFor(0, h, 16, n_ < 32768 ? 1 : threads_, [&](int64_t b, int64_t e) {
      for (int64_t v = b; v < e; ++v) {
        const int* id = index.ptr<int>(static_cast<int>(v));
        const int* above = v > 0 ? index.ptr<int>(static_cast<int>(v - 1)) : nullptr;
        const int* below = v + 1 < h ? index.ptr<int>(static_cast<int>(v + 1)) : nullptr;
        for (int u = 0; u < w; ++u) {
          const int i = id[u];
          if (i < 0) continue;
          double sum = 0.0, degree = 1e-9;
          if (above && above[u] >= 0) sum += -x[above[u]], degree += 1;
          if (u > 0 && id[u - 1] >= 0) sum += -x[id[u - 1]], degree += 1;
          const int right = u + 1 < w ? id[u + 1] : -1;
          const int down = below ? below[u] : -1;
          if (right >= 0) degree += 1;
          if (down >= 0) degree += 1;
          sum += degree * x[i];
          if (right >= 0) sum += -x[right];
          if (down >= 0) sum += -x[down];
          dst[i] += alpha * sum;
        }
      }
    });
  }

 private:
  const cv::Mat* index_;
  Eigen::Index n_;
  int threads_;
};

}  // namespace lumenrig::solvers::internal

namespace Eigen::internal {
template <typename Rhs>
struct generic_product_impl<lumenrig::solvers::internal::PoissonOperator, Rhs, SparseShape, DenseShape, GemvProduct>
    : generic_product_impl_base<lumenrig::solvers::internal::PoissonOperator, Rhs,
                                generic_product_impl<lumenrig::solvers::internal::PoissonOperator, Rhs>> {
  using Scalar = typename Product<lumenrig::solvers::internal::PoissonOperator, Rhs>::Scalar;
  template <typename Dest>
  static void scaleAndAddTo(Dest& dst, const lumenrig::solvers::internal::PoissonOperator& lhs, const Rhs& rhs,
                            const Scalar& alpha) {
    const Eigen::Ref<const Eigen::VectorXd> x(rhs);  // no copy for a plain vector
    lhs.AddProduct(x.data(), alpha, dst.data());
  }
};
}  // namespace Eigen::internal

namespace lumenrig::solvers::internal {
namespace {

/// One level of the hierarchy: a weighted graph Laplacian
/// (A x)_i = diag_i x_i - sum_j w_ij x_j over the level's unknowns. The
/// V-cycle works in single precision (conjugate gradients stay in double):
/// it only has to approximate A^-1, and it is bound by memory traffic, which
/// floats halve. The finest level's edges all weigh 1 and are not stored.
/// Every unknown sits in a cell of the level's grid (the pixel grid halved
/// `level` times); edges join unknowns of 4-adjacent cells only, so colouring
/// cells by (v + u) parity makes a red-black ordering: unknowns [0, red) are
/// red, [red, n) black, and no edge joins two of one colour.
struct Level {
  int64_t n = 0, red = 0;
  std::vector<int> cell_v, cell_u;
  std::vector<int64_t> edge_begin;   // edges of unknown i: [edge_begin[i], edge_begin[i + 1])
  std::vector<int> edge_to;          // the other unknown j
  std::vector<float> edge_w;         // w_ij > 0 (empty when every weight is 1)
  std::vector<float> diag;           // sum of the row's weights; 1 for an unknown without edges
  std::vector<int> parent;           // the coarser level's unknown (aggregate) of each unknown
  std::vector<int64_t> child_begin;  // coarser -> finer: children of unknown k are
  std::vector<int> children;         // children[child_begin[k] .. child_begin[k + 1])
  std::vector<float> x, b, r;
};

/// Chunks of unknowns (io::ParallelFor's fixed chunks), serial when small.
void ForChunks(int64_t begin, int64_t end, int threads, const std::function<void(int64_t, int64_t)>& fn) {
  constexpr int64_t kChunk = 8192;  // unknowns per task
  io::ParallelFor(begin, end, kChunk, end - begin < 4 * kChunk ? 1 : threads, fn);
}

/// Diagonal, red count and work vectors once cells and edges are set.
void FinishLevel(Level* l) {
  l->diag.assign(l->n, 0.0f);
  for (int64_t i = 0; i < l->n; ++i) {
    float d = 0;
    for (int64_t k = l->edge_begin[i]; k < l->edge_begin[i + 1]; ++k) d += l->edge_w.empty() ? 1.0f : l->edge_w[k];
    l->diag[i] = d > 0 ? d : 1.0f;
  }
  l->red = 0;
  while (l->red < l->n && ((l->cell_v[l->red] + l->cell_u[l->red]) & 1) == 0) ++l->red;
  l->x.assign(l->n, 0.0f);
  l->b.assign(l->n, 0.0f);
  l->r.assign(l->n, 0.0f);
}

/// The coarser level. Unknowns of one 2 x 2 block of cells that are joined
/// by edges inside the block form one aggregate, so an aggregate never spans
/// two parts that are not connected (two hair strands a pixel apart stay
/// apart). The coarse operator is half the Galerkin product P^T A P of the
/// piecewise-constant prolongation P: each coarse edge weighs half the fine
/// edges that cross between the two aggregates. The half is the scaling of
/// the coarse correction that aggregation needs on Poisson problems (D.
/// Braess, "Towards algebraic multigrid for elliptic problems of second
/// order", Computing 55, 1995).
Level Coarsen(Level& f) {
  const int64_t n = f.n;
  int grid_h = 0, grid_w = 0;
  for (int64_t i = 0; i < n; ++i)
    grid_h = std::max(grid_h, f.cell_v[i] / 2 + 1), grid_w = std::max(grid_w, f.cell_u[i] / 2 + 1);
  auto block = [&](int64_t i) { return static_cast<int64_t>(f.cell_v[i] / 2) * grid_w + f.cell_u[i] / 2; };
  // Union-find over the edges inside a block; a root is its set's smallest index.
  std::vector<int> root(n);
  std::iota(root.begin(), root.end(), 0);
  auto find = [&](int i) {
    while (root[i] != i) i = root[i] = root[root[i]];
    return i;
  };
  for (int64_t i = 0; i < n; ++i)
    for (int64_t k = f.edge_begin[i]; k < f.edge_begin[i + 1]; ++k) {
      const int j = f.edge_to[k];
      if (j <= i || block(i) != block(j)) continue;
      const int a = find(static_cast<int>(i)), b = find(j);
      if (a != b) root[std::max(a, b)] = std::min(a, b);
    }
  // Aggregates in red-black order of their blocks (red blocks first, each
  // colour row-major), within a block by root: a counting sort.
  const int64_t cells = static_cast<int64_t>(grid_h) * grid_w;
  auto rank = [&](int64_t cell) {  // position of a block in red-black order
    const int64_t v = cell / grid_w, u = cell % grid_w;
    return ((v + u) & 1) * cells + cell;
  };
  std::vector<int64_t> start(2 * cells + 1, 0);
  for (int64_t i = 0; i < n; ++i)
    if (find(static_cast<int>(i)) == i) ++start[rank(block(i)) + 1];
  for (int64_t c = 0; c < 2 * cells; ++c) start[c + 1] += start[c];
  Level c;
  c.n = start[2 * cells];
  c.cell_v.resize(c.n);
  c.cell_u.resize(c.n);
  f.parent.resize(n);
  for (int64_t i = 0; i < n; ++i) {
    const int r = find(static_cast<int>(i));
    if (r == i) {
      const int64_t k = start[rank(block(i))]++;
      c.cell_v[k] = f.cell_v[i] / 2;
      c.cell_u[k] = f.cell_u[i] / 2;
      f.parent[i] = static_cast<int>(k);
    } else {
      f.parent[i] = f.parent[r];  // r < i: already numbered
    }
  }
  // Children lists (increasing fine index) for the restriction.
  c.child_begin.assign(c.n + 1, 0);
  for (int64_t i = 0; i < n; ++i) ++c.child_begin[f.parent[i] + 1];
  for (int64_t k = 0; k < c.n; ++k) c.child_begin[k + 1] += c.child_begin[k];
  c.children.resize(n);
  std::vector<int64_t> fill(c.child_begin.begin(), c.child_begin.end() - 1);
  for (int64_t i = 0; i < n; ++i) c.children[fill[f.parent[i]]++] = static_cast<int>(i);
  // Coarse edges: per aggregate, the crossing fine edges summed by
  // neighbouring aggregate, in first-seen order (slot[] finds the entry).
  c.edge_begin.assign(c.n + 1, 0);
  c.edge_to.reserve(f.edge_to.size() / 2);
  c.edge_w.reserve(f.edge_to.size() / 2);
  std::vector<int64_t> slot(c.n, -1);
  for (int64_t k = 0; k < c.n; ++k) {
    const int64_t row_start = static_cast<int64_t>(c.edge_to.size());
    for (int64_t ci = c.child_begin[k]; ci < c.child_begin[k + 1]; ++ci) {
      const int i = c.children[ci];
      for (int64_t e = f.edge_begin[i]; e < f.edge_begin[i + 1]; ++e) {
        const int other = f.parent[f.edge_to[e]];
        if (other == k) continue;
        const float half_w = 0.5f * (f.edge_w.empty() ? 1.0f : f.edge_w[e]);
        if (slot[other] < row_start) {
          slot[other] = static_cast<int64_t>(c.edge_to.size());
          c.edge_to.push_back(other);
          c.edge_w.push_back(half_w);
        } else {
          c.edge_w[slot[other]] += half_w;
        }
      }
    }
    c.edge_begin[k + 1] = static_cast<int64_t>(c.edge_to.size());
  }
  FinishLevel(&c);
  return c;
}

/// sum_j w_ij x_j over the edges of unknown i.
template <bool kUnit>
inline float NeighbourSum(const Level& l, int64_t i) {
  float s = 0;
  for (int64_t k = l.edge_begin[i]; k < l.edge_begin[i + 1]; ++k)
    s += kUnit ? l.x[l.edge_to[k]] : l.edge_w[k] * l.x[l.edge_to[k]];
  return s;
}

/// One red-black Gauss-Seidel half sweep over [begin, end) (one colour):
/// each update reads only the other colour, so the chunks may run in any
/// order and the result is the same.
template <bool kUnit>
void SweepRange(Level& l, int64_t b, int64_t e) {
  for (int64_t i = b; i < e; ++i) l.x[i] = (l.b[i] + NeighbourSum<kUnit>(l, i)) / l.diag[i];
}
void Sweep(Level& l, int64_t begin, int64_t end, int threads) {
  ForChunks(begin, end, threads, [&](int64_t b, int64_t e) {
    if (l.edge_w.empty())
      SweepRange<true>(l, b, e);
    else
      SweepRange<false>(l, b, e);
  });
}

/// r = b - A x on the fine level, then the coarse right-hand side = the sum
/// of r over each aggregate.
template <bool kUnit>
void ResidualRange(Level& f, int64_t b, int64_t e) {
  for (int64_t i = b; i < e; ++i) f.r[i] = f.b[i] - f.diag[i] * f.x[i] + NeighbourSum<kUnit>(f, i);
}
void RestrictResidual(Level& f, Level& c, int threads) {
  ForChunks(0, f.n, threads, [&](int64_t b, int64_t e) {
    if (f.edge_w.empty())
      ResidualRange<true>(f, b, e);
    else
      ResidualRange<false>(f, b, e);
  });
  ForChunks(0, c.n, threads, [&](int64_t b, int64_t e) {
    for (int64_t k = b; k < e; ++k) {
      float s = 0;
      for (int64_t j = c.child_begin[k]; j < c.child_begin[k + 1]; ++j) s += f.r[c.children[j]];
      c.b[k] = s;
      c.x[k] = 0.0f;
    }
  });
}

/// Fine x += coarse x of the aggregate (piecewise-constant prolongation).
void ProlongAdd(const Level& c, Level& f, int threads) {
  ForChunks(0, f.n, threads, [&](int64_t b, int64_t e) {
    for (int64_t i = b; i < e; ++i) f.x[i] += c.x[f.parent[i]];
  });
}

/// The hierarchy and its coarsest-level factorisation.
class Hierarchy {
 public:
  Hierarchy(const cv::Mat& index, int threads) : threads_(threads) {
    // Finest level: one unknown per pixel of `index`, red pixels first,
    // each colour in row-major order; its edges join 4-neighbour pixels of
    // the index, in the order above, left, right, below (all weigh 1).
    Level fine;
    for (int colour = 0; colour < 2; ++colour)
      for (int v = 0; v < index.rows; ++v) {
        const int* id = index.ptr<int>(v);
        for (int u = (v + colour) & 1; u < index.cols; u += 2)
          if (id[u] >= 0) fine.cell_v.push_back(v), fine.cell_u.push_back(u), from_level_.push_back(id[u]);
      }
    fine.n = static_cast<int64_t>(from_level_.size());
    to_level_.assign(fine.n, 0);
    for (int64_t k = 0; k < fine.n; ++k) to_level_[from_level_[k]] = static_cast<int>(k);
    fine.edge_begin.assign(fine.n + 1, 0);
    fine.edge_to.reserve(static_cast<size_t>(fine.n) * 4);
    for (int64_t k = 0; k < fine.n; ++k) {
      const int v = fine.cell_v[k], u = fine.cell_u[k];
      const int* id = index.ptr<int>(v);
      auto edge = [&](int j) {
        if (j >= 0) fine.edge_to.push_back(to_level_[j]);
      };
      if (v > 0) edge(index.ptr<int>(v - 1)[u]);
      if (u > 0) edge(id[u - 1]);
      if (u + 1 < index.cols) edge(id[u + 1]);
      if (v + 1 < index.rows) edge(index.ptr<int>(v + 1)[u]);
      fine.edge_begin[k + 1] = static_cast<int64_t>(fine.edge_to.size());
    }
    FinishLevel(&fine);
    levels_.push_back(std::move(fine));
    // Coarser levels down to a size the sparse Cholesky solves at once, or
    // until aggregation stops shrinking the problem.
    constexpr int64_t kCoarsestUnknowns = 4096;
    while (levels_.back().n > kCoarsestUnknowns) {
      Level c = Coarsen(levels_.back());
      const bool shrinking = c.n < levels_.back().n * 9 / 10;
      levels_.push_back(std::move(c));
      if (!shrinking) break;
    }
    FactorCoarsest();
  }

  /// One symmetric V-cycle applied to r (an approximate A^-1 r).
  Eigen::VectorXd Apply(const Eigen::VectorXd& r) {
    Level& fine = levels_.front();
    const int64_t n = fine.n;
    ForChunks(0, n, threads_, [&](int64_t b, int64_t e) {
      for (int64_t k = b; k < e; ++k) fine.b[to_level_[k]] = static_cast<float>(r[k]), fine.x[k] = 0.0f;
    });
    VCycle(0);
    Eigen::VectorXd out(n);
    ForChunks(0, n, threads_, [&](int64_t b, int64_t e) {
      for (int64_t k = b; k < e; ++k) out[k] = fine.x[to_level_[k]];
    });
    return out;
  }

 private:
  void FactorCoarsest() {
    const Level& l = levels_.back();
    std::vector<Eigen::Triplet<double>> t;
    for (int64_t i = 0; i < l.n; ++i) {
      // A relative ridge keeps each floating part definite; a preconditioner
      // need not be exact on the per-part constants.
      t.emplace_back(i, i, l.diag[i] * (1.0 + 1e-6));
      for (int64_t k = l.edge_begin[i]; k < l.edge_begin[i + 1]; ++k)
        t.emplace_back(i, l.edge_to[k], l.edge_w.empty() ? -1.0 : -static_cast<double>(l.edge_w[k]));
    }
    Eigen::SparseMatrix<double> m(l.n, l.n);
    m.setFromTriplets(t.begin(), t.end());
    coarse_.compute(m);
  }

  void VCycle(size_t level) {
    Level& l = levels_[level];
    if (level + 1 == levels_.size()) {
      const Eigen::VectorXd x = coarse_.solve(Eigen::Map<const Eigen::VectorXf>(l.b.data(), l.n).cast<double>());
      for (int64_t i = 0; i < l.n; ++i) l.x[i] = static_cast<float>(x[i]);
      return;
    }
    // Pre-smoothing red then black, post-smoothing black then red: the
    // adjoint order keeps the V-cycle symmetric, as conjugate gradients need.
    constexpr int kSweeps = 2;  // measured best per unit time (1: 35 iterations, 3: 19) on a 1.1M-pixel bust mask
    for (int s = 0; s < kSweeps; ++s) Sweep(l, 0, l.red, threads_), Sweep(l, l.red, l.n, threads_);
    Level& c = levels_[level + 1];
    RestrictResidual(l, c, threads_);
    VCycle(level + 1);
    ProlongAdd(c, l, threads_);
    for (int s = 0; s < kSweeps; ++s) Sweep(l, l.red, l.n, threads_), Sweep(l, 0, l.red, threads_);
  }

  int threads_;
  std::vector<int> to_level_;    // system unknown -> finest-level unknown
  std::vector<int> from_level_;  // and back
  std::vector<Level> levels_;
  Eigen::SimplicialLDLT<Eigen::SparseMatrix<double>> coarse_;
};

/// Eigen preconditioner interface over a Hierarchy built beforehand.
class VCyclePreconditioner {
 public:
  VCyclePreconditioner() = default;
  template <typename M>
  VCyclePreconditioner& analyzePattern(const M&) {
    return *this;
  }
  template <typename M>
  VCyclePreconditioner& factorize(const M&) {
    return *this;
  }
  template <typename M>
  VCyclePreconditioner& compute(const M&) {
    return *this;
  }
  Eigen::ComputationInfo info() { return Eigen::Success; }
  void Attach(Hierarchy* hierarchy) { hierarchy_ = hierarchy; }
  template <typename Rhs>
  Eigen::VectorXd solve(const Rhs& r) const {
    return hierarchy_->Apply(r);
  }

 private:
  Hierarchy* hierarchy_ = nullptr;
};

}  // namespace

Eigen::VectorXd SolvePoissonMultigrid(const cv::Mat& index, const Eigen::VectorXd& rhs, double tolerance,
                                      int max_iterations, int threads, MultigridReport* report) {
  Hierarchy hierarchy(index, threads);
  const PoissonOperator a(&index, rhs.size(), threads);
  Eigen::ConjugateGradient<PoissonOperator, Eigen::Lower | Eigen::Upper, VCyclePreconditioner> cg;
  cg.setTolerance(tolerance);
  cg.setMaxIterations(max_iterations);
  cg.compute(a);
  cg.preconditioner().Attach(&hierarchy);
  Eigen::VectorXd x = cg.solve(rhs);
  // Zero mean over every connected part (4-neighbour, like the edges), as
  // the ridge gives the direct solve.
  cv::Mat labels;
  const int parts = cv::connectedComponents(index >= 0, labels, 4, CV_32S);
  std::vector<double> sum(static_cast<size_t>(parts), 0.0);
  std::vector<int64_t> count(static_cast<size_t>(parts), 0);
  for (int v = 0; v < index.rows; ++v) {
    const int* id = index.ptr<int>(v);
    const int* l = labels.ptr<int>(v);
    for (int u = 0; u < index.cols; ++u)
      if (id[u] >= 0) sum[static_cast<size_t>(l[u])] += x[id[u]], ++count[static_cast<size_t>(l[u])];
  }
  for (int v = 0; v < index.rows; ++v) {
    const int* id = index.ptr<int>(v);
    const int* l = labels.ptr<int>(v);
    for (int u = 0; u < index.cols; ++u)
      if (id[u] >= 0)
        x[id[u]] -= sum[static_cast<size_t>(l[u])] / static_cast<double>(count[static_cast<size_t>(l[u])]);
  }
  if (report) {
    report->iterations = static_cast<int>(cg.iterations());
    report->residual = cg.error();
  }
  return x;
}

}  // namespace lumenrig::solvers::internal
