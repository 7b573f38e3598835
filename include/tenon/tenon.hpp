// tenon: everything in one include.
#pragma once

#include "tenon/version.hpp"

#include "tenon/core/error.hpp"
#include "tenon/core/error_codes.hpp"
#include "tenon/core/gemm.hpp"
#include "tenon/core/matrix.hpp"
#include "tenon/core/random.hpp"

#include "tenon/autodiff/custom_operation.hpp"
#include "tenon/autodiff/gradient_check.hpp"
#include "tenon/autodiff/operations.hpp"
#include "tenon/autodiff/parameter.hpp"
#include "tenon/autodiff/tape.hpp"
