// tenon: everything in one include.
#pragma once

#include "tenon/version.hpp"

#include "tenon/core/activation_functions.hpp"
#include "tenon/core/bytes.hpp"
#include "tenon/core/elementwise.hpp"
#include "tenon/core/json_text.hpp"
#include "tenon/core/error.hpp"
#include "tenon/core/error_codes.hpp"
#include "tenon/core/gemm.hpp"
#include "tenon/core/matrix.hpp"
#include "tenon/core/parallel.hpp"
#include "tenon/core/random.hpp"
#include "tenon/core/simd.hpp"
#include "tenon/core/small_dense.hpp"

#include "tenon/autodiff/custom_operation.hpp"
#include "tenon/autodiff/gradient_check.hpp"
#include "tenon/autodiff/operations.hpp"
#include "tenon/autodiff/parameter.hpp"
#include "tenon/autodiff/tape.hpp"

#include "tenon/prep/cell_parsing.hpp"
#include "tenon/prep/column_screening.hpp"
#include "tenon/prep/csv.hpp"
#include "tenon/prep/encoding.hpp"
#include "tenon/prep/idx.hpp"
#include "tenon/prep/imputation.hpp"
#include "tenon/prep/plan.hpp"
#include "tenon/prep/reference.hpp"
#include "tenon/prep/scaling.hpp"
#include "tenon/prep/split.hpp"
#include "tenon/prep/statistics.hpp"
#include "tenon/prep/table.hpp"

#include "tenon/layers/activation.hpp"
#include "tenon/layers/dense.hpp"
#include "tenon/layers/dropout.hpp"
#include "tenon/layers/initializers.hpp"
#include "tenon/layers/layer.hpp"
#include "tenon/layers/network.hpp"
#include "tenon/layers/normalization.hpp"

#include "tenon/losses/classification.hpp"
#include "tenon/losses/loss_options.hpp"
#include "tenon/losses/regression.hpp"

#include "tenon/update/rules.hpp"
#include "tenon/update/schedules.hpp"
#include "tenon/update/update_rule.hpp"

#include "tenon/train/baseline.hpp"
#include "tenon/train/calibration.hpp"
#include "tenon/train/metrics.hpp"
#include "tenon/train/report_svg.hpp"
#include "tenon/train/search.hpp"
#include "tenon/train/trainer.hpp"
#include "tenon/train/workflow.hpp"

#include "tenon/format/architecture.hpp"
#include "tenon/format/atomic_file.hpp"
#include "tenon/format/calibration.hpp"
#include "tenon/format/checksum.hpp"
#include "tenon/format/model_file.hpp"
#include "tenon/format/training_state.hpp"

#include "tenon/serve.hpp"  // drift and the predictor; TENON_SERVE_COMPILED applies here too

#include "tenon/train/authoring.hpp"
#include "tenon/train/retraining.hpp"

#if defined(TENON_HAS_ZLIB)
#include "tenon/prep/idx_gzip.hpp"
#endif

#if defined(TENON_HAS_MPI)
#include "tenon/distributed/communicator.hpp"
#include "tenon/distributed/data_parallel.hpp"
#include "tenon/distributed/plan_merge.hpp"
#endif
#include "tenon/distributed/fleet_averaging.hpp"
