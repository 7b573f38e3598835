// The include for everything, and nothing else.
#include <tenon/tenon.hpp>

int main() { return tenon::version_number() > 0 ? 0 : 1; }
