// Owner of the precompiled test-framework headers every test executable reuses
// (cmake/HeadroomStages.cmake, headroom_test_pch_anchor); it tests nothing.
int main() { return 0; }
